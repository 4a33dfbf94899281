"""`tinygen emulate --json`: one documented object, counts for every sample, and per-op rows
that name the kernel and the ONNX node they came from."""
import json
import re
import subprocess
import sys
from pathlib import Path

import onnx
import pytest

pytestmark = pytest.mark.target

ROOT = Path(__file__).resolve().parents[2]
DOOR = ROOT / "examples" / "door_camera" / "door_camera.onnx"


def documented_keys(verb: str) -> set[str]:
    text = (ROOT / "docs" / "cli.md").read_text().split("## JSON keys", 1)[1]
    m = re.search(rf"^- {verb}: (.*?)(?=^- |\Z)", text.split("\n## ", 1)[0], re.S | re.M)
    return set(re.findall(r"`(\w+)`", m.group(1)))


def test_emulate_json_has_every_sample_and_named_ops():
    r = subprocess.run([sys.executable, "-m", "tinygen", "emulate", str(DOOR), "--cpu",
                        "cortex-m4", "--samples", "3", "--json"], capture_output=True,
                       text=True, cwd=ROOT)
    assert r.returncode == 0, r.stderr
    info = json.loads(r.stdout)
    keys = documented_keys("emulate")
    assert set(info) <= keys, set(info) - keys
    assert info["samples"] == 3 and len(info["instructions_per_sample"]) == 3
    assert info["instructions"] == info["instructions_per_sample"][0]
    assert info["instructions_min"] == min(info["instructions_per_sample"])
    assert info["instructions_max"] == max(info["instructions_per_sample"])
    nodes = {n.name: n.op_type for n in onnx.load(str(DOOR)).graph.node}
    assert info["per_op"]
    for row in info["per_op"]:
        assert set(row) <= keys
        assert row["kernel"].startswith("tg_") or row["kernel"] == "memcpy"
        assert nodes[row["node"]] == row["onnx_op"]  # the node is in the file, as that op
        assert len(row["instructions_per_sample"]) == 3
        assert row["instructions"] == row["instructions_per_sample"][0] > 0
