"""The HTML report: verdicts against the budgets, escaping, and that it stands alone."""
from __future__ import annotations

import json
import re
import xml.etree.ElementTree as ET
from html.parser import HTMLParser

from tests.report.conftest import HOSTILE_NODE, HOSTILE_TENSOR, PUMP
from tinygen import cli
from tinygen.codegen.emit import render_tree
from tinygen.compiler import BuildOptions, compile_model, summary
from tinygen.report.html import render_report, write_report
from tinygen.report.plan_view import compare_planners


class TagCollector(HTMLParser):
    """Start tags, attribute names and text of a document (stdlib html.parser)."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags, self.attrs, self.text = [], [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs += [a for a, _ in attrs]

    def handle_data(self, data):
        self.text.append(data)


def parse(doc: str) -> TagCollector:
    p = TagCollector()
    p.feed(doc)
    p.close()
    return p


def flash_bytes(c) -> int:
    render_tree(c, "test")
    return c.const_bytes


def test_verdicts_fit_exactly_and_over(pump):
    arena, flash = summary(pump)["arena_bytes"], flash_bytes(pump)
    doc = render_report(pump, arena, flash + 100, "flags")
    assert f"RAM fits: arena {arena} B of a {arena} B budget, headroom 0 B (0.0%)" in doc
    assert (f"Flash fits: constants {flash} B of a {flash + 100} B budget, headroom 100 B "
            f"({100 * 100 / (flash + 100):.1f}%)") in doc
    doc = render_report(pump, arena - 1, flash - 1, "flags")
    assert f"RAM does not fit: arena {arena} B, budget {arena - 1} B, over by 1 B" in doc
    assert f"Flash does not fit: constants {flash} B, budget {flash - 1} B, over by 1 B" in doc
    doc = render_report(pump, None, None, "flags")
    assert f"RAM: arena {arena} B (no --budget-ram given)" in doc
    assert "no --budget-flash given" in doc


def test_flash_figure_is_the_emitted_constants(tmp_path, capsys):
    # compile_model renders the C to count every flash constant: same figure as `emit --json`
    assert cli.main(["emit", str(PUMP), "-o", str(tmp_path / "t"), "--json"]) == 0
    emitted = json.loads(capsys.readouterr().out)
    c = compile_model(str(PUMP), BuildOptions())
    assert c.const_bytes == emitted["const_bytes"]
    doc = render_report(c, None, None, "f")
    assert emitted["const_bytes"] >= emitted["weights_bytes"]
    assert f"Flash: constants {emitted['const_bytes']} B" in doc


def test_over_budget_still_writes_and_exits_0(tmp_path, capsys, pump):
    out = tmp_path / "r.html"
    rc = cli.main(["report", str(PUMP), "-o", str(out), "--budget-ram", "1K",
                   "--budget-flash", "1M"])
    assert rc == 0
    doc = out.read_text()
    assert "RAM does not fit" in doc and "Flash fits" in doc
    assert f"{summary(pump)['arena_bytes']} B, budget 1024 B" in doc


def test_unwritable_path_is_exit_2(tmp_path, capsys):
    rc = cli.main(["report", str(PUMP), "-o", str(tmp_path / "no" / "such" / "r.html")])
    assert rc == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "cannot write" in err[0]


def test_report_is_self_contained(pump):
    doc = render_report(pump, 4096, 65536, "--requant fixed")
    p = parse(doc)
    assert not {"script", "link", "img", "iframe", "object", "embed"} & set(p.tags)
    assert not {"src", "href"} & set(p.attrs)
    assert "url(" not in doc and "@import" not in doc
    # the only address is the SVG namespace name, which is never fetched
    assert set(re.findall(r"https?://[^\s\"'<>]+", doc)) == {"http://www.w3.org/2000/svg"}
    svg = doc[doc.index("<svg"):doc.index("</svg>") + 6]
    ET.fromstring(svg)  # the inline picture is well-formed XML


def test_report_sections_carry_the_figures(pump):
    doc = render_report(pump, None, None, "--requant fixed")
    info = summary(pump)
    text = " ".join(parse(doc).text)
    assert pump.graph.source_sha256 in text
    assert "--requant fixed" in text
    for key in ("arena_bytes", "lower_bound_bytes", "naive_bytes", "weights_bytes", "macs"):
        assert str(info[key]) in text
    for op in pump.graph.ops:  # every op's node name and MACs appear in the per-op table
        assert op.name in text
    for m in pump.per_op_macs:
        assert f'<td class="n">{m}</td>' in doc
    for planner in ("greedy-size", "first-fit", "naive"):
        assert doc.count(f"<td>{planner}</td>") == 2  # once per order


def test_report_names_the_better_order(twin_path, pump):
    c = compile_model(str(twin_path), BuildOptions())
    text = "".join(parse(render_report(c, None, None, "f")).text)
    given = summary(c)["arena_bytes"]
    best = compile_model(str(twin_path), BuildOptions(order="min-peak")).plan.arena_bytes
    assert best < given
    assert (f"Smallest arena: {best} B with --planner auto --order min-peak, "
            f"{given - best} B below this build's {given} B.") in text
    assert "is the smallest of these" in render_report(pump, None, None, "f")


def test_hostile_names_are_escaped(hostile_path, tmp_path):
    c = compile_model(str(hostile_path), BuildOptions())
    out = tmp_path / "r.html"
    lines = write_report(c, str(out), 1, 1, "x")
    assert any("does not fit" in line for line in lines)
    doc = out.read_text()
    p = parse(doc)
    assert "script" not in p.tags  # the node name did not become markup
    assert p.tags.count("i") == 0  # nor did the graph name '<i>net</i>'
    text = "".join(p.text)
    # after un-escaping, the names read as written; the control character as \x07
    assert HOSTILE_NODE.replace("\x07", "\\x07") in text
    assert HOSTILE_TENSOR in text
    assert "<i>net</i>" in text
    assert "\x07" not in doc


def test_plan_json_unchanged_by_report(tmp_path, capsys, pump):
    assert cli.main(["plan", str(PUMP), "--json"]) == 0
    assert json.loads(capsys.readouterr().out) == dict(summary(pump),
                                                       const_bytes=pump.const_bytes)


def test_planner_that_does_not_fit_the_regions_is_shown_not_raised():
    c = compile_model(str(PUMP), BuildOptions(regions=[("fast", 2048), ("slow", 1024)]))
    doc = render_report(c, None, None, "f")
    text = "".join(parse(doc).text)
    # no reuse needs every buffer at once: more than the 3072 B the two regions hold;
    # first-fit (2944 B in one arena) does not split into 2048 + 1024 either
    assert summary(c)["naive_bytes"] > 3072
    rows = compare_planners(c)
    unfit = [r.planner for r in rows if r.arena is None]
    assert "naive" in unfit and "first-fit" in unfit and "auto" not in unfit, unfit
    assert text.count("fits in no region") == len(unfit)
    assert f"This build's arena, {summary(c)['arena_bytes']} B, is the smallest" in text
