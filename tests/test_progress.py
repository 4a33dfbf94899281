"""Progress lines: on a terminal only, never under --json, erased when the work is done.

The terminal is a real pseudo-terminal (os.openpty, POSIX): the CLI's stderr is its slave
end, as when a user runs tinygen in a shell.
"""
from __future__ import annotations

import io
import os
import subprocess
import sys
from pathlib import Path

import pytest

from tinygen.progress import Progress

ROOT = Path(__file__).resolve().parent.parent
PUMP = ROOT / "examples" / "pump_vibration" / "pump_vibration.onnx"


class Tty(io.StringIO):
    def isatty(self):
        return True


def test_silent_when_not_a_terminal():
    out = io.StringIO()
    p = Progress("work", 3, stream=out)
    p.phase("stage", 3)
    for i in range(4):
        p.step(i)
    p.done()
    assert out.getvalue() == ""


def test_one_line_rewritten_and_erased():
    out = Tty()
    with Progress("work", 2, stream=out) as p:
        p.phase("stage one", 2)
        p.step(2)
    text = out.getvalue()
    assert "stage one..." in text and "stage one: 2/2" in text
    assert "\n" not in text and text.endswith("\r\x1b[K")


def run_on_pty(args: list[str]) -> tuple[int, str, str]:
    master, slave = os.openpty()
    try:
        proc = subprocess.Popen([sys.executable, "-m", "tinygen", *args], cwd=ROOT,
                                stdout=subprocess.PIPE, stderr=slave, stdin=subprocess.DEVNULL)
        os.close(slave)
        chunks = []
        while True:
            try:
                data = os.read(master, 65536)
            except OSError:  # the slave side closed: the process is done
                break
            if not data:
                break
            chunks.append(data)
        out, _ = proc.communicate(timeout=300)
    finally:
        os.close(master)
    return proc.returncode, out.decode(), b"".join(chunks).decode(errors="replace")


@pytest.mark.skipif(not hasattr(os, "openpty"), reason="needs a POSIX pseudo-terminal")
def test_cli_shows_progress_on_a_terminal_but_not_with_json():
    rc, _, err = run_on_pty(["check", str(PUMP), "--samples", "30"])
    assert rc == 0 and "C vs reference, samples" in err and "\x1b[K" in err
    rc, out, err = run_on_pty(["check", str(PUMP), "--samples", "30", "--json"])
    assert rc == 0 and out.lstrip().startswith("{") and "\x1b[K" not in err
