"""tinygen: quantized ONNX models to static-memory C99 for bare-metal microcontrollers.

Python use (docs/python.md): `tinygen.compile("model.onnx")` gives a tinygen.Model with the
model's figures, `run()` (the emitted C on numpy arrays), `reference()`, `emit()` and
`check()`. Errors a user can act on are tinygen.TinygenError.
"""

__version__ = "0.1.0"
__all__ = ["compile", "Model", "TensorInfo", "TinygenError", "__version__"]


def __getattr__(name: str):
    # Loaded on first use, so `import tinygen` (and the CLI's start) stays light.
    if name in ("compile", "Model", "TensorInfo"):
        from tinygen import api
        return getattr(api, name)
    if name == "TinygenError":
        from tinygen.errors import TinygenError
        return TinygenError
    raise AttributeError(f"module 'tinygen' has no attribute '{name}'")
