"""ONNX in, plain integer IR out. Only this package touches ONNX protobufs."""
from tinygen.frontend.lower import load_graph

__all__ = ["load_graph"]
