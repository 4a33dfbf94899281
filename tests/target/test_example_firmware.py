"""examples/firmware builds against a tree given by TREE= and runs under QEMU."""
import re
import shutil
import subprocess
from pathlib import Path

import pytest

pytestmark = pytest.mark.target

ROOT = Path(__file__).resolve().parents[2]
EXAMPLE = ROOT / "examples" / "firmware"
FIXTURE = Path(__file__).resolve().parent / "fixtures" / "addone"


def _make(tmp_path: Path, tree: Path, cpu: str) -> subprocess.CompletedProcess:
    if shutil.which("make") is None:
        pytest.skip("make not installed")
    return subprocess.run(["make", "-s", "-C", str(EXAMPLE), f"TREE={tree}", f"CPU={cpu}",
                           f"BUILD={tmp_path / 'build'}", "run"],
                          capture_output=True, text=True, timeout=60, stdin=subprocess.DEVNULL)


def _expected_class(window_scale: float = 0.05) -> tuple[int, int]:
    """What the fixture must answer for the demo's sensor window, computed here: the
    readings of main.c's app_sensor_reading, quantized as ONNX QuantizeLinear does
    (round half to even, saturate), through the fixture's documented function."""
    period = 40
    scores = []
    for i in range(16):
        phase = (i // 3 + 10 * (i % 3)) % period
        tri = phase if phase < period // 2 else period - phase
        x = 0.04 * tri - 0.4
        q = max(-128, min(127, round(x / window_scale)))   # Python rounds half to even
        t = ((q + 1 + 128) & 0xFF) - 128
        y = (t * 37 + 11) & 0xFF
        scores.append(y - 256 if y > 127 else y)
    best = max(range(16), key=lambda k: (scores[k], -k))
    return best, int(scores[best] * 0.0078125 * 1000)


@pytest.mark.parametrize("cpu", ["cortex-m3", "cortex-m4"])
def test_demo_runs_on_the_fixture_tree(cpu, tmp_path):
    proc = _make(tmp_path, FIXTURE, cpu)
    assert proc.returncode == 0, proc.stderr
    best, milli = _expected_class()
    assert "arena: 48 bytes" in proc.stdout
    assert f"class: {best}\n" in proc.stdout
    assert f"score: {milli} milli" in proc.stdout
    # The model's static arena (48 bytes, from model.o) sits in the .arena section.
    demo_map = (tmp_path / "build" / "demo.map").read_text()
    arena_part = demo_map.split("\n.arena", 1)[1].split("\n.bss", 1)[0]
    assert re.search(r"\.arena\s+0x[0-9a-f]+\s+0x30 \S*model\.o", arena_part)
