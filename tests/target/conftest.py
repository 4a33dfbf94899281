"""Target tests need the Arm cross toolchain and QEMU (and, for the RISC-V cores, the rv32
toolchain, picolibc and qemu-system-riscv32); without them they skip, saying how to install
them."""
import pytest

from tinygen.errors import TinygenError
from tinygen.harness.toolchain import find_toolchain


def _missing_reason(arch: str = "arm") -> str:
    try:
        find_toolchain(arch)
    except TinygenError as exc:
        return exc.reason
    return ""


def _wants_riscv(item) -> bool:
    params = getattr(getattr(item, "callspec", None), "params", {})
    return str(params.get("cpu", "")).startswith("rv32")


def pytest_collection_modifyitems(config, items):
    reason = _missing_reason()
    riscv_reason = _missing_reason("riscv")
    for item in items:
        if "target" not in item.keywords:
            continue
        if reason:
            item.add_marker(pytest.mark.skip(reason=reason))
        elif riscv_reason and _wants_riscv(item):
            item.add_marker(pytest.mark.skip(reason=riscv_reason))
