"""Where onnxruntime is not a reference on this CPU: tests skip their agreement check."""

import pytest

from tinygen.check import U8S8_NOTE, onnxruntime_saturates_u8s8, uint8_with_int8_weights


def skip_if_onnxruntime_inexact(model_path) -> None:
    """Skip an onnxruntime-agreement assertion where onnxruntime itself is inexact.

    Source: onnxruntime's quantization documentation (uint8 x int8 kernels on x86 CPUs
    without VNNI saturate 16-bit pair sums); tinygen.check probes it on this CPU. Callers
    assert bit-exactness against the reference before calling this."""
    if uint8_with_int8_weights(str(model_path)) and onnxruntime_saturates_u8s8():
        pytest.skip(U8S8_NOTE)
