"""Run `tinygen ARGS` in a forked child of the test process, like a subprocess but without
the second it takes `python -m tinygen` to import onnx.

The child calls the same `tinygen.cli.main` that `python -m tinygen` calls, with fds 1 and
2 on files, in a folder and under a umask of the test's choosing; `before` runs in the
child first (to replace a function at a named point, e.g. to pause there for a signal).
POSIX only: where there is no fork the callers skip.
"""
from __future__ import annotations

import io
import os
import subprocess
import sys
import tempfile
from collections.abc import Callable
from pathlib import Path


class Child:
    """A running `tinygen` child: its pid, and `wait()` for its CompletedProcess."""

    def __init__(self, args: tuple[str, ...], cwd: Path | None = None, umask: int | None = None,
                 before: Callable[[], None] | None = None):
        self.args = args
        self._out = tempfile.TemporaryFile()
        self._err = tempfile.TemporaryFile()
        sys.stdout.flush()
        sys.stderr.flush()
        self.pid = os.fork()
        if self.pid == 0:
            self._child(cwd, umask, before)

    def _child(self, cwd, umask, before) -> None:
        code = 99
        try:
            os.dup2(self._out.fileno(), 1)
            os.dup2(self._err.fileno(), 2)
            sys.stdout = io.TextIOWrapper(os.fdopen(1, "wb", closefd=False))
            sys.stderr = io.TextIOWrapper(os.fdopen(2, "wb", closefd=False))
            os.environ.pop("TINYGEN_TRACEBACK", None)
            if cwd is not None:
                os.chdir(cwd)
            if umask is not None:
                os.umask(umask)
            if before is not None:
                before()
            from tinygen.cli import main
            code = main(list(self.args))
        except BaseException:  # noqa: B036 - report anything, as a real process would
            import traceback
            traceback.print_exc()
        finally:
            sys.stdout.flush()
            sys.stderr.flush()
            os._exit(code if isinstance(code, int) else 98)

    def wait(self) -> subprocess.CompletedProcess:
        _, status = os.waitpid(self.pid, 0)
        self._out.seek(0)
        self._err.seek(0)
        done = subprocess.CompletedProcess(self.args, os.waitstatus_to_exitcode(status),
                                           self._out.read().decode(), self._err.read().decode())
        self._out.close()
        self._err.close()
        return done


def forked(*args: str, cwd: Path | None = None, umask: int | None = None,
           before: Callable[[], None] | None = None) -> subprocess.CompletedProcess:
    """`tinygen args` in a forked child, run to its end."""
    return Child(tuple(str(a) for a in args), cwd, umask, before).wait()
