"""The CLI contract outside scripts rely on (DESIGN.md section 4): verbs, flags, JSON keys,
exit codes. Runs the real command line in a subprocess."""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parent.parent
PUMP = ROOT / "examples" / "pump_vibration" / "pump_vibration.onnx"
EMIT_KEYS = {"arena_bytes", "lower_bound_bytes", "naive_bytes", "weights_bytes", "macs", "ops",
             "planner", "order", "files"}
CHECK_KEYS = {"samples", "bit_exact", "mismatched_elements", "onnxruntime"}


def tinygen(*args, cwd=ROOT):
    return subprocess.run([sys.executable, "-m", "tinygen", *map(str, args)], cwd=cwd,
                          capture_output=True, text=True)


def test_emit_json_has_the_contract_keys(tmp_path):
    r = tinygen("emit", PUMP, "-o", tmp_path / "out", "--json")
    assert r.returncode == 0, r.stderr
    info = json.loads(r.stdout)
    assert EMIT_KEYS <= set(info)
    assert "model.c" in info["files"] and "model.h" in info["files"]
    assert info["lower_bound_bytes"] <= info["arena_bytes"] <= info["naive_bytes"]
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == sorted(info["files"])


def test_emit_writes_only_the_kernels_used(tmp_path):
    r = tinygen("emit", PUMP, "-o", tmp_path / "out", "--json")
    files = set(json.loads(r.stdout)["files"])
    assert "tg_conv.c" in files and "tg_fc.c" in files and "tg_pool.c" in files
    assert "tg_softmax.c" not in files and "tg_eltwise.c" not in files


def test_check_json_and_exit_code(tmp_path):
    r = tinygen("check", PUMP, "--samples", "3", "--json", "--against-onnxruntime")
    assert r.returncode == 0, r.stderr
    info = json.loads(r.stdout)
    assert CHECK_KEYS <= set(info)
    assert info["bit_exact"] is True and info["samples"] == 3
    assert set(info["onnxruntime"]) == {"max_abs_diff", "equal_fraction"}


def test_check_reads_an_inputs_file(tmp_path):
    data = np.random.default_rng(0).normal(0, 1, (5, 1, 3, 128)).astype(np.float32)
    np.savez(tmp_path / "in.npz", inputs=data)
    r = tinygen("check", PUMP, "--inputs", tmp_path / "in.npz", "--json")
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["samples"] == 5


def test_plan_json_keys():
    r = tinygen("plan", PUMP, "--json")
    assert r.returncode == 0, r.stderr
    assert EMIT_KEYS - {"files"} <= set(json.loads(r.stdout))


@pytest.mark.parametrize("size,expected", [("262144", 262144), ("256K", 262144),
                                           ("1M", 1048576), ("0x40000", 262144)])
def test_sizes_accept_the_documented_forms(size, expected):
    from tinygen.cli import parse_size
    assert parse_size(size) == expected


def test_arena_limit_exceeded_is_exit_2_with_one_line(tmp_path):
    r = tinygen("emit", PUMP, "-o", tmp_path / "out", "--arena-limit", "1K")
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "arena-limit" in lines[0] and "Traceback" not in r.stderr
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("flags", [["--io", "external"], ["--no-inplace"],
                                   ["--order", "min-peak"], ["--planner", "first-fit"],
                                   ["--planner", "naive"], ["--align", "16"],
                                   ["--region", "fast=2K", "--region", "slow=64K"],
                                   ["--prefix", "pump"]])
def test_build_flags_stay_bit_exact(flags):
    r = tinygen("check", PUMP, "--samples", "3", "--json", *flags)
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["bit_exact"] is True


def test_planners_order_as_expected():
    sizes = {}
    for planner in ("greedy-size", "first-fit", "naive"):
        r = tinygen("plan", PUMP, "--json", "--planner", planner)
        sizes[planner] = json.loads(r.stdout)
    assert sizes["naive"]["arena_bytes"] == sizes["naive"]["naive_bytes"]
    for s in sizes.values():
        assert s["arena_bytes"] >= s["lower_bound_bytes"]
    assert sizes["greedy-size"]["arena_bytes"] <= sizes["naive"]["arena_bytes"]


def test_regions_split_the_arena(tmp_path):
    r = tinygen("emit", PUMP, "-o", tmp_path / "out", "--region", "fast=1K",
                "--region", "slow=64K", "--json")
    assert r.returncode == 0, r.stderr
    header = (tmp_path / "out" / "model.h").read_text()
    assert "MODEL_REGION_SLOW_BYTES" in header


def test_bad_prefix_is_refused():
    r = tinygen("plan", PUMP, "--prefix", "int")
    assert r.returncode == 2 and "prefix" in r.stderr


def test_existing_outdir_is_kept_without_force(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    r = tinygen("emit", PUMP, "-o", out)
    assert r.returncode == 2 and (out / "keep.txt").read_text() == "mine"
    r = tinygen("emit", PUMP, "-o", out, "--force")
    assert r.returncode == 0 and not (out / "keep.txt").exists()
