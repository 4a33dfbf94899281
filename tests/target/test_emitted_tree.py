"""The harness and the demo firmware against a tree the emitter really produced."""
import subprocess
from pathlib import Path

import numpy as np
import pytest

from tinygen.emulate import emulate

pytestmark = pytest.mark.target

ROOT = Path(__file__).resolve().parents[2]
MODEL = ROOT / "examples" / "pump_vibration" / "pump_vibration.onnx"


def _emit(out: Path, *flags: str) -> Path:
    if not MODEL.exists():
        pytest.skip(f"{MODEL} not present")
    from tinygen.cli import main
    assert main(["emit", str(MODEL), "-o", str(out), *flags]) == 0
    return out


@pytest.fixture(scope="module")
def pump_tree(tmp_path_factory) -> Path:
    return _emit(tmp_path_factory.mktemp("pump") / "tree")


@pytest.mark.parametrize("io", ["arena", "external"])
def test_target_matches_the_host_build(io, tmp_path):
    # The same C compiled for the host (tinygen.harness.host, gcc on x86) and for a
    # Cortex-M4 under QEMU must give the same bytes.
    from tinygen.harness.host import HostModel
    tree = _emit(tmp_path / "tree", "--io", io)
    rng = np.random.default_rng(7)
    samples = [rng.integers(0, 256, 384, dtype=np.uint8) for _ in range(2)]
    host = HostModel(tree, "model", tmp_path / "host")
    want = [[host.run([s], [(4, np.uint8)], io=io)[0].tobytes()] for s in samples]
    fig = emulate(tree, "model", "cortex-m4", [[s.tobytes()] for s in samples],
                  requant_float=False)
    assert fig["io"] == io
    assert fig["outputs"] == want
    assert fig["forbidden_symbols"] == [] and fig["float_instructions"] == []
    assert fig["ram_bytes"] >= fig["arena_bytes"] > 0
    assert len(fig["per_op"]) >= 2 and fig["instructions"] > sum(
        row["instructions"] for row in fig["per_op"])


def test_demo_firmware_builds_on_the_emitted_tree(pump_tree, tmp_path):
    proc = subprocess.run(["make", "-s", "-C", str(ROOT / "examples" / "firmware"),
                           f"TREE={pump_tree}", f"BUILD={tmp_path}", "run"],
                          capture_output=True, text=True, timeout=120,
                          stdin=subprocess.DEVNULL)
    assert proc.returncode == 0, proc.stderr
    assert "class: " in proc.stdout and "arena: " in proc.stdout
