"""The bench tables on one model: figures equal the compiler's; timings are never asserted."""
from __future__ import annotations

import shutil

import pytest

from tests.report.conftest import PUMP
from tinygen import bench
from tinygen.codegen.emit import render_tree, write_tree
from tinygen.compiler import summary


def md_rows(table: str) -> list[list[str]]:
    return [[c.strip() for c in line.strip("|").split("|")] for line in table.splitlines()[2:]]


def test_example_models_leave_out_float_exports():
    models = bench.example_models()
    assert PUMP in models
    assert not any(m.name.endswith("_float.onnx") for m in models)


def test_memory_table_matches_the_compiler(pump):
    mb = bench.bench_memory(PUMP)
    assert not mb.error
    rows = md_rows(bench.memory_table([mb]))
    by_planner = {r[1]: r for r in rows if r[0] == "pump_vibration"}
    assert set(by_planner) == {"auto", "greedy-size", "first-fit", "greedy-lifetime",
                               "greedy-area", "naive", "*lower bound*"}
    info = summary(pump)  # default flags: planner auto, given order
    assert int(by_planner["auto"][2]) == info["arena_bytes"]
    for p in ("greedy-size", "first-fit", "greedy-lifetime", "greedy-area"):  # auto never loses
        for col in range(2, 6):
            assert int(by_planner["auto"][col]) <= int(by_planner[p][col])
    assert int(by_planner["naive"][2]) == info["naive_bytes"]
    assert int(by_planner["*lower bound*"][2]) == info["lower_bound_bytes"]
    for r in rows:  # no planner below its order's lower bound
        for col in range(2, 6):
            assert int(r[col]) >= int(by_planner["*lower bound*"][col])
    fig = md_rows(bench.figures_table([mb]))[0]
    assert fig == ["pump_vibration", str(info["ops"]), str(info["macs"]),
                   str(info["weights_bytes"]), str(mb.flash_bytes), str(info["naive_bytes"])]


def test_model_it_cannot_compile_gets_a_note(tmp_path):
    bad = tmp_path / "broken.onnx"
    bad.write_bytes(b"not a model")
    text = bench.run_bench([bad], with_speed=False)
    assert "## Not benchmarked" in text and "- broken: not compiled:" in text


def test_bench_main_writes_results_with_speed(tmp_path, capsys):
    out = tmp_path / "results.md"
    assert bench.main([str(PUMP), "--out", str(out)]) == 0
    text = out.read_text()
    assert capsys.readouterr().out == text + "\n"  # printed as written
    speed = md_rows(text.split("## Host speed", 1)[1].split("\n\n", 2)[2].split("\n\n")[0])
    assert speed[0][0] == "pump_vibration"
    assert all(float(v) > 0 for v in speed[0][1:6])  # measured, not asserted against a time


@pytest.mark.skipif(shutil.which("valgrind") is None, reason="valgrind not installed")
def test_callgrind_count_is_deterministic(tmp_path, pump):
    tree = tmp_path / "tree"
    write_tree(render_tree(pump, "bench"), str(tree), force=True)
    counts = [bench.callgrind_instructions(tree, "model", 1, 1, tmp_path / f"w{i}")
              for i in range(2)]
    assert counts[0] == counts[1]
    # every multiply-accumulate costs at least one instruction (common practice)
    assert counts[0] > pump.macs
