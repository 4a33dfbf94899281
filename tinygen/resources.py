"""The folders tinygen reads at run time, found inside the installed package.

Kernel sources (tinygen.runtime_c, mapped from the top-level runtime_c/ folder by setup.py),
the code templates and the firmware harness files are package data: importlib.resources
finds them in a wheel install as in an editable one, wherever the command runs.
"""
from __future__ import annotations

import atexit
import contextlib
import functools
from importlib import resources
from pathlib import Path

_opened = contextlib.ExitStack()
atexit.register(_opened.close)


@functools.cache
def _folder(package: str, name: str) -> Path:
    ref = resources.files(package)
    if name:
        ref = ref / name
    # A real folder for any install on disk; as_file extracts it otherwise (zip imports).
    return Path(_opened.enter_context(resources.as_file(ref)))


def runtime_dir() -> Path:
    """runtime_c: include/ (kernel headers) and src/ (kernel sources)."""
    return _folder("tinygen.runtime_c", "")


def templates_dir() -> Path:
    """The jinja2 templates of the emitted tree."""
    return _folder("tinygen.codegen", "templates")


def firmware_dir() -> Path:
    """Startup code, semihosting, linker scripts and measurement main of the QEMU harness."""
    return _folder("tinygen.harness", "firmware")
