"""The HTML report opened in a real browser: headless Chromium (Debian package `chromium`;
`make test` installs it when run as root) renders the per-layer table and the arena picture,
logs nothing to its console, and paints both (the screenshot holds the picture's buffer fill
and the table's header shade, not a blank page).

The browser runs offline and fresh: no sandbox (root), no GPU, no first-run, background
networking, component update or sync, and its own empty profile folder.
"""
from __future__ import annotations

import re
import shutil
import struct
import subprocess
import zlib
from pathlib import Path

import pytest

from tests.report.conftest import PUMP
from tinygen import cli
from tinygen.report.plan_view import FILLS

BROWSER = shutil.which("chromium") or shutil.which("chromium-browser")
pytestmark = pytest.mark.skipif(
    BROWSER is None, reason="needs headless Chromium: apt-get install chromium (make test "
    "installs it when run as root)")
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--enable-logging=stderr", "--v=0"]


def chromium(tmp_path: Path, page: Path, *args: str) -> subprocess.CompletedProcess:
    profile = tmp_path / f"profile-{len(list(tmp_path.glob('profile-*')))}"
    return subprocess.run([BROWSER, *FLAGS, f"--user-data-dir={profile}", *args,
                           page.resolve().as_uri()], capture_output=True, text=True,
                          timeout=180)


def console_messages(stderr: str) -> list[str]:
    """What the page logged (Chromium writes console messages as ':CONSOLE' lines) and
    failed loads (net::ERR_...)."""
    return [line for line in stderr.splitlines() if ":CONSOLE" in line or "net::ERR_" in line]


def png_pixels(data: bytes) -> tuple[int, int, list[bytes]]:
    """(width, height, rows of RGB(A) bytes) of an 8-bit non-interlaced PNG (PNG spec,
    W3C: chunks, zlib stream, per-row filters 0-4)."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    pos, idat, width = 8, b"", 0
    while pos < len(data):
        length, kind = struct.unpack(">I4s", data[pos:pos + 8])
        body = data[pos + 8:pos + 8 + length]
        if kind == b"IHDR":
            width, height, depth, color, _, _, interlace = struct.unpack(">IIBBBBB", body)
            assert depth == 8 and color in (2, 6) and interlace == 0
            bpp = 3 if color == 2 else 4
        elif kind == b"IDAT":
            idat += body
        pos += 12 + length
    raw = zlib.decompress(idat)
    stride = width * bpp
    rows, prev = [], bytearray(stride)
    for y in range(height):
        line = raw[y * (stride + 1):(y + 1) * (stride + 1)]
        f, cur = line[0], bytearray(line[1:])
        for i in range(stride):
            a = cur[i - bpp] if i >= bpp else 0
            b, c = prev[i], prev[i - bpp] if i >= bpp else 0
            if f == 1:
                cur[i] = (cur[i] + a) & 255
            elif f == 2:
                cur[i] = (cur[i] + b) & 255
            elif f == 3:
                cur[i] = (cur[i] + (a + b) // 2) & 255
            elif f == 4:
                p = a + b - c
                pa, pb, pc = abs(p - a), abs(p - b), abs(p - c)
                cur[i] = (cur[i] + (a if pa <= pb and pa <= pc else b if pb <= pc else c)) & 255
        rows.append(bytes(cur) if bpp == 3 else bytes(v for j, v in enumerate(cur) if j % 4 != 3))
        prev = cur
    return width, height, rows


def colour_counts(rows: list[bytes]) -> dict[tuple[int, int, int], int]:
    counts: dict[tuple[int, int, int], int] = {}
    for row in rows[::2]:
        for i in range(0, len(row), 6):
            px = (row[i], row[i + 1], row[i + 2])
            counts[px] = counts.get(px, 0) + 1
    return counts


def hex_rgb(colour: str) -> tuple[int, int, int]:
    return tuple(int(colour[i:i + 2], 16) for i in (1, 3, 5))


def test_console_check_catches_a_page_error(tmp_path):
    page = tmp_path / "bad.html"
    page.write_text('<html><body><script>console.error("on purpose");</script></body></html>')
    r = chromium(tmp_path, page, "--dump-dom")
    assert any("on purpose" in m for m in console_messages(r.stderr))


def test_report_renders_table_and_picture(tmp_path):
    report = tmp_path / "report.html"
    assert cli.main(["report", str(PUMP), "-o", str(report), "--budget-ram", "8K",
                     "--samples", "4"]) == 0
    dom = chromium(tmp_path, report, "--dump-dom")
    assert dom.returncode == 0, dom.stderr[-2000:]
    assert console_messages(dom.stderr) == []
    # the rendered document: the per-layer table with one row per step and the picture
    assert "<svg" in dom.stdout and dom.stdout.count('class="buf"') >= 4
    table = dom.stdout[dom.stdout.index("Ops in execution order"):]
    table = table[:table.index("</table>")]
    assert len(re.findall(r"<tr>", table)) == 1 + 8  # header + the model's 8 steps
    assert "SQNR dB" in table and 'class="top"' in table
    shot = tmp_path / "shot.png"
    r = chromium(tmp_path, report, f"--screenshot={shot}", "--window-size=1300,2200")
    assert r.returncode == 0 and shot.exists(), r.stderr[-2000:]
    assert console_messages(r.stderr) == []
    width, height, rows = png_pixels(shot.read_bytes())
    assert (width, height) == (1300, 2200)
    counts = colour_counts(rows)
    white = counts.get((255, 255, 255), 0)
    assert white < 0.97 * sum(counts.values())  # not a blank page
    assert counts.get(hex_rgb(FILLS[0]), 0) > 200  # a buffer of the arena picture, painted
    assert counts.get(hex_rgb("#f0f0f0"), 0) > 200  # the tables' header shade
