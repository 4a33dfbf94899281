"""Target tests need the Arm cross toolchain and QEMU; without them they skip, saying how
to install them."""
import pytest

from tinygen.errors import TinygenError
from tinygen.harness.toolchain import find_toolchain


def _missing_reason() -> str:
    try:
        find_toolchain()
    except TinygenError as exc:
        return exc.reason
    return ""


def pytest_collection_modifyitems(config, items):
    reason = _missing_reason()
    if not reason:
        return
    skip = pytest.mark.skip(reason=reason)
    for item in items:
        if "target" in item.keywords:
            item.add_marker(skip)
