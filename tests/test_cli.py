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
    assert {"max_abs_diff", "equal_fraction"} <= set(info["onnxruntime"]) <= {
        "max_abs_diff", "equal_fraction", "note"}  # note: docs/numerics.md


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
    r = tinygen("emit", PUMP, "-o", out, "--force")  # not a tree tinygen wrote: kept too
    assert r.returncode == 2 and (out / "keep.txt").read_text() == "mine"
    assert "keep.txt" in r.stderr and len(r.stderr.splitlines()) == 1


# -- output conventions and the documented keys (docs/cli.md) -----------------------------

def documented_keys(verb: str) -> set[str]:
    """The backquoted keys docs/cli.md lists for `verb` under "JSON keys"."""
    import re
    text = (ROOT / "docs" / "cli.md").read_text().split("## JSON keys", 1)[1]
    text = text.split("\n## ", 1)[0]
    m = re.search(rf"^- {verb}: (.*?)(?=^- |\Z)", text, re.S | re.M)
    assert m, f"docs/cli.md lists no keys for {verb}"
    return set(re.findall(r"`(\w+)`", m.group(1)))


@pytest.mark.parametrize("verb,args", [
    ("emit", ["-o", "OUT"]), ("plan", []), ("check", ["--samples", "2"]),
    ("report", ["-o", "OUT/r.html"])])
def test_every_verb_prints_one_documented_json_object(verb, args, tmp_path):
    args = [str(tmp_path / a[4:]) if a.startswith("OUT") else a for a in args]
    if verb == "report":
        (tmp_path).mkdir(exist_ok=True)
    r = tinygen(verb, PUMP, *args, "--json")
    assert r.returncode == 0, r.stderr
    info = json.loads(r.stdout)  # exactly one object: json.loads refuses anything after it
    assert isinstance(info, dict) and r.stderr == ""
    assert set(info) <= documented_keys(verb), set(info) - documented_keys(verb)


def test_sanitize_key_is_documented():
    assert "sanitizer_problem" in documented_keys("check")


@pytest.mark.parametrize("verb,args", [("plan", []), ("check", ["--samples", "2"]),
                                       ("emit", ["-o", "OUT"])])
def test_results_go_to_stdout_and_nothing_to_stderr(verb, args, tmp_path):
    args = [str(tmp_path / "out") if a == "OUT" else a for a in args]
    r = tinygen(verb, PUMP, *args)
    assert r.returncode == 0 and r.stderr == "", r.stderr
    expected = {"plan": "arena plan for", "check": "C vs reference: bit-exact",
                "emit": "wrote "}[verb]
    assert expected in r.stdout


@pytest.mark.parametrize("args", [["check", "missing.onnx"], ["plan", str(PUMP), "--align", "3"],
                                  ["plan", str(PUMP), "--planner", "nope"]])
def test_an_error_with_json_is_one_object_too(args):
    r = tinygen(*args, "--json")
    assert r.returncode == 2
    err = json.loads(r.stdout)
    assert set(err) <= documented_keys("error") and err["exit_code"] == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0] == f"tinygen: error: {err['error']}"


@pytest.mark.parametrize("regions,message", [
    (["fast=1K", "fast=2K"], "--region 'fast' given twice"),
    (["fast=1K", "FAST=2K"], "'FAST' and 'fast' differ only in case"),
    (["1bad=8K"], "region name '1bad' must be a C identifier"),
    (["fast=8Q"], "'8Q' is not a size"),
    (["fast"], "is not NAME=SIZE"),
])
def test_region_flags_say_what_is_wrong(regions, message):
    r = tinygen("plan", PUMP, *[a for reg in regions for a in ("--region", reg)])
    assert r.returncode == 2 and message in r.stderr, r.stderr
    assert "fits in no region" not in r.stderr


def test_region_names_keep_their_spelling(tmp_path):
    r = tinygen("emit", PUMP, "-o", tmp_path / "out", "--region", "Fast=1K",
                "--region", "Slow=64K")
    assert r.returncode == 0, r.stderr
    model_c = (tmp_path / "out" / "model.c").read_text()
    assert "model_region_Slow" in model_c and "MODEL_REGION_SLOW_PLACEMENT" in model_c
    assert "MODEL_REGION_SLOW_BYTES" in (tmp_path / "out" / "model.h").read_text()


def test_flash_limit_is_the_flash_constants_and_shows_both_figures():
    figures = json.loads(tinygen("plan", PUMP, "--json").stdout)
    weights, constants = figures["weights_bytes"], figures["const_bytes"]
    assert weights < constants
    between = (weights + constants) // 2  # the weights fit, all constants do not
    r = tinygen("plan", PUMP, "--flash-limit", str(between))
    assert r.returncode == 2
    assert f"constants need {constants} bytes of flash (weights {weights}), over " \
           f"--flash-limit {between}" in r.stderr
    assert tinygen("plan", PUMP, "--flash-limit", str(constants)).returncode == 0
