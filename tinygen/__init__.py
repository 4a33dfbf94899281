"""tinygen: quantized ONNX models to static-memory C99 for bare-metal microcontrollers."""

__version__ = "0.1.0"
