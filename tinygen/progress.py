"""Progress on stderr for long work (many --inputs, emulation, traces, fuzz campaigns).

Shown only when the stream is a terminal and the caller did not ask for JSON: a single line
rewritten in place (at most ten times a second) and erased when the work is done, so logs,
pipes and `--json` output never see it.
"""
from __future__ import annotations

import sys
import time

REFRESH_S = 0.1


class Progress:
    """`label: done/total` on one terminal line; `Progress.off()` does nothing at all."""

    def __init__(self, label: str, total: int | None = None, stream=None,
                 enabled: bool | None = None):
        self.stream = stream if stream is not None else sys.stderr
        isatty = getattr(self.stream, "isatty", None)
        self.enabled = bool(isatty and isatty()) if enabled is None else enabled
        self.label, self.total = label, total
        self._last = 0.0
        self._shown = False

    @classmethod
    def off(cls) -> Progress:
        return cls("", enabled=False)

    def phase(self, label: str, total: int | None = None) -> Progress:
        """Start a new stage on the same line (e.g. 'emulating on cortex-m4')."""
        self.label, self.total = label, total
        self._write(label + "...", force=True)
        return self

    def step(self, done: int) -> None:
        of = f"/{self.total}" if self.total else ""
        self._write(f"{self.label}: {done}{of}", force=self.total is not None and
                    done >= self.total)

    def done(self) -> None:
        if self.enabled and self._shown:
            self.stream.write("\r\x1b[K")
            self.stream.flush()
            self._shown = False

    def _write(self, text: str, force: bool = False) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if not force and now - self._last < REFRESH_S:
            return
        self._last = now
        self.stream.write("\r\x1b[K" + text[:200])
        self.stream.flush()
        self._shown = True

    def __enter__(self) -> Progress:
        return self

    def __exit__(self, *exc) -> None:
        self.done()


def for_cli(args, label: str, total: int | None = None) -> Progress:
    """A Progress on stderr unless the verb prints JSON."""
    if getattr(args, "json", False):
        return Progress.off()
    return Progress(label, total)
