"""The plan table and picture against the compiler's own figures (summary(c)) and the plan."""
from __future__ import annotations

import re
import xml.etree.ElementTree as ET

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tests.report.conftest import HOSTILE_NODE, PUMP
from tinygen import cli
from tinygen.compiler import BuildOptions, Compiled, compile_model, plan_arena, summary
from tinygen.ir import Graph, IOInfo, Op, Tensor
from tinygen.report.plan_view import (
    MIN_BUFFER_PX,
    buffer_rows,
    compare_planners,
    live_profile,
    plan_svg,
    plan_table,
    printable,
    short_name,
)

SVG = "{http://www.w3.org/2000/svg}"


def table_total(text: str, label: str) -> int:
    m = re.search(rf"^  {label}\s+(-?\d+) B", text, re.M)
    assert m, f"no '{label}' line in the table"
    return int(m.group(1))


def arena_buffers(c):
    return [b for b in c.plan.buffers.values() if b.external is None]


def check_table_against_summary(c) -> None:
    text = plan_table(c)
    info = summary(c)
    assert table_total(text, "arena") == info["arena_bytes"]
    assert table_total(text, "lower bound") == info["lower_bound_bytes"]
    assert table_total(text, "no reuse") == info["naive_bytes"]
    assert table_total(text, "planner loss") == info["arena_bytes"] - info["lower_bound_bytes"]
    # the peak of the per-step profile is the lower bound the compiler reports
    assert max(r.live_bytes for r in live_profile(c)) == info["lower_bound_bytes"]
    ids = re.findall(r"^  (b\d+)  ", text, re.M)
    assert ids == [f"b{i}" for i in range(len(arena_buffers(c)))]


def check_svg_against_plan(c) -> None:
    root = ET.fromstring(plan_svg(c))
    rects = [r for r in root.iter(f"{SVG}rect") if r.get("class") == "buf"]
    rows = buffer_rows(c)
    assert len(rects) == len(rows) == len(arena_buffers(c))
    # each rectangle's title names its buffer (drawn largest first, so small ones stay on
    # top); heights follow sizes with a visible minimum, widths lifetimes
    by_id = {r.find(f"{SVG}title").text.split(" ", 1)[0]: r for r in rects}
    rects = [by_id[row.ident] for row in rows]
    for rect, row in zip(rects, rows, strict=True):
        assert rect.find(f"{SVG}title").text.startswith(f"{row.ident} {printable(row.buf.name)}")
    big = max(zip(rects, rows, strict=True), key=lambda p: p[1].buf.size)
    px_per_byte = float(big[0].get("height")) / big[1].buf.size
    px_per_step = (float(big[0].get("width")) + 2) / (big[1].buf.last - big[1].buf.first + 1)
    for rect, row in zip(rects, rows, strict=True):
        b = row.buf
        assert abs(float(rect.get("height")) - max(b.size * px_per_byte, MIN_BUFFER_PX)) < 0.2
        assert abs(float(rect.get("width")) + 2 - (b.last - b.first + 1) * px_per_step) < 0.2


def test_table_totals_equal_summary_on_example(pump):
    check_table_against_summary(pump)


def test_table_totals_equal_summary_on_branching_model(branchy):
    check_table_against_summary(branchy)


def test_table_lists_one_line_per_step_with_macs(pump):
    text = plan_table(pump)
    steps = text.split("\nsteps\n", 1)[1].splitlines()[1:]
    assert len(steps) == len(pump.plan.order) + 2  # the caller's in and out steps too
    profile = live_profile(pump)
    assert sum(r.macs for r in profile) == summary(pump)["macs"]
    for line, r in zip(steps, profile, strict=True):
        assert re.search(rf" {r.macs} +{r.live_bytes}  ", line), line
    assert sum("<- peak" in line for line in steps) == 1


def test_svg_has_one_rect_per_arena_buffer(pump, branchy):
    check_svg_against_plan(pump)
    check_svg_against_plan(branchy)


def test_svg_is_deterministic(branchy_path):
    a = plan_svg(compile_model(str(branchy_path), BuildOptions()))
    b = plan_svg(compile_model(str(branchy_path), BuildOptions()))
    assert a == b


def test_svg_and_table_with_regions_and_external_io(branchy_path, branchy):
    opts = BuildOptions(regions=[("fast", 1024), ("slow", 65536)], io="external")
    c = compile_model(str(branchy_path), opts)
    assert len(c.plan.regions) == 2
    check_svg_against_plan(c)  # caller-owned buffers are not drawn
    check_table_against_summary(c)
    assert "outside the arena" in plan_table(c)
    assert len(arena_buffers(c)) < len(c.plan.buffers)


def test_hostile_names_stay_printable_ascii(hostile_path):
    c = compile_model(str(hostile_path), BuildOptions())
    text = plan_table(c)
    assert all(ch == "\n" or 32 <= ord(ch) < 127 for ch in text)
    svg = plan_svg(c)
    root = ET.fromstring(svg)  # would fail on a raw '<' or '&' in a name
    titles = " ".join(t.text for t in root.iter(f"{SVG}title"))
    assert "act\"<b>&amp;\\xe9" in titles  # the tensor name, decoded back from the XML
    assert "<script>" not in svg and HOSTILE_NODE not in svg


def test_short_name_keeps_the_tail_and_width():
    assert short_name("/features/features.2/Relu_output_0_QuantizeLinear_Output") == \
        "/features/features.2/Relu"
    long = "x" * 20 + "/" + "y" * 50
    assert len(short_name(long, 30)) <= 30 and short_name(long, 30).endswith("y" * 10)
    assert short_name("a\tb\u2603") == "a\\x09b\\u2603"


def test_planner_comparison_never_below_lower_bound(pump, branchy):
    for c in (pump, branchy):
        rows = compare_planners(c)
        assert len(rows) == 12  # six planners (auto, four heuristics, naive) x two orders
        for r in rows:
            assert r.arena >= r.lower_bound
            assert r.arena_no_inplace >= r.lower_bound_no_inplace
            assert r.arena <= r.naive
        this = next(r for r in rows if r.planner == "auto" and r.order == "given")
        assert this.arena == summary(c)["arena_bytes"]
        for r in rows:  # auto keeps the smallest of the heuristics for its order
            if r.planner != "naive" and r.order == "given" and r.arena is not None:
                assert this.arena <= r.arena


def test_inplace_lowers_the_branching_model(branchy):
    # the Sigmoid table runs in place on the conv output it reads last
    rows = compare_planners(branchy)
    given = next(r for r in rows if r.planner == "greedy-size" and r.order == "given")
    assert given.arena < given.arena_no_inplace


def test_min_peak_goes_below_the_given_order_bound(twin_path):
    c = compile_model(str(twin_path), BuildOptions())
    rows = {(r.planner, r.order): r for r in compare_planners(c)}
    given, best = rows["greedy-size", "given"], rows["greedy-size", "min-peak"]
    assert given.lower_bound == summary(c)["lower_bound_bytes"]
    assert best.arena < given.lower_bound  # re-ordering beats any placement of the given order
    assert best.arena >= best.lower_bound


def test_plan_verb_writes_the_same_svg(tmp_path, capsys, pump):
    out = tmp_path / "plan.svg"
    assert cli.main(["plan", str(PUMP), "--svg", str(out)]) == 0
    assert out.read_text() == plan_svg(pump)
    shown = capsys.readouterr().out  # the table is a result: stdout
    assert table_total(shown, "arena") == summary(pump)["arena_bytes"]


# -- random graphs: the views hold for any plan, not only the examples --------------------

@st.composite
def random_compiled(draw):
    """A random DAG of plain, table (in-place capable), add and view ops."""
    sizes = st.integers(1, 3000)
    tensors = {"x": Tensor("x", (1, draw(sizes)), "int8")}
    names, ops = ["x"], []
    for i in range(draw(st.integers(1, 9))):
        kind = draw(st.sampled_from(["conv", "lut", "add", "view"]))
        ins = [draw(st.sampled_from(names))]
        if kind == "add":
            ins.append(draw(st.sampled_from(names)))
        shape = (1, draw(sizes)) if kind == "conv" else tensors[ins[0]].shape
        out = f"t{i}"
        tensors[out] = Tensor(out, shape, "int8")
        ops.append(Op(kind, ins, [out], name=f"<op{i}>", onnx_op=kind))
        names.append(out)
    io = [IOInfo("x", "x", "int8", "int8", None)]
    g = Graph("random", tensors, ops, io, [IOInfo(names[-1], "y", "int8", "int8", None)])
    opts = BuildOptions(planner=draw(st.sampled_from(["greedy-size", "first-fit", "naive"])),
                        order=draw(st.sampled_from(["given", "min-peak"])),
                        align=draw(st.sampled_from([4, 8, 16])),
                        inplace=draw(st.booleans()))
    plan = plan_arena(g, opts)
    return Compiled(g, plan, opts, 0, 0, [0] * len(ops))


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(random_compiled())
def test_views_agree_with_the_plan_on_random_graphs(c):
    check_table_against_summary(c)
    check_svg_against_plan(c)
    for r in compare_planners(c):
        assert r.arena >= r.lower_bound  # no placement can beat the live sum at one step
