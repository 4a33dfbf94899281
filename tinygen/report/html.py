"""`tinygen report`: one self-contained HTML file (inline CSS and SVG, no script, nothing
fetched) with the model, RAM and flash against the budgets, every op, the arena picture and
the planner comparison.

Over budget is a finding, not an error: the report is written either way and the verdict
lines say what does not fit by how much.
"""
from __future__ import annotations

import html
from dataclasses import dataclass
from pathlib import Path

import tinygen
from tinygen.errors import TinygenError
from tinygen.report.plan_view import (
    buffer_rows,
    compare_planners,
    kernel_of,
    live_profile,
    plan_figures,
    plan_svg,
    step_label,
)

CSS = """
body { font-family: "DejaVu Sans", Arial, Helvetica, sans-serif; margin: 24px auto;
       max-width: 1100px; color: #1b1b1b; padding: 0 16px; }
h1 { font-size: 22px; margin-bottom: 4px; }
h2 { font-size: 17px; margin-top: 28px; border-bottom: 1px solid #ccc; padding-bottom: 3px; }
table { border-collapse: collapse; font-size: 13px; margin: 6px 0; }
th, td { border: 1px solid #d0d0d0; padding: 3px 8px; text-align: left; vertical-align: top; }
th { background: #f0f0f0; }
td.n { text-align: right; font-variant-numeric: tabular-nums; font-family: monospace; }
td.name { font-family: monospace; word-break: break-all; max-width: 420px; }
tr.this td { background: #eef5ff; }
.verdict { padding: 7px 12px; margin: 6px 0; border-radius: 4px; font-weight: bold; }
.fits { background: #e3f4e1; border: 1px solid #5a9e52; }
.nofit { background: #fbe3e1; border: 1px solid #c0392b; }
.nobudget { background: #f3f3f3; border: 1px solid #aaa; font-weight: normal; }
.note { color: #555; font-size: 13px; }
.picture { overflow-x: auto; border: 1px solid #ddd; }
"""


def _t(text) -> str:
    """Model-supplied text for HTML: control characters shown as \\xNN, then escaped."""
    s = "".join(ch if ch.isprintable() else f"\\x{ord(ch):02x}" for ch in str(text))
    return html.escape(s, quote=True)


@dataclass
class Verdict:
    """One resource against its budget."""

    what: str  # "RAM" or "Flash"
    measure: str  # what is counted, e.g. "arena"
    need: int
    budget: int | None
    flag: str  # the CLI flag that sets the budget

    @property
    def status(self) -> str:
        if self.budget is None:
            return "no budget"
        return "fits" if self.need <= self.budget else "does not fit"

    def line(self) -> str:
        if self.budget is None:
            return f"{self.what}: {self.measure} {self.need} B (no {self.flag} given)"
        if self.need <= self.budget:
            room = self.budget - self.need
            pct = 100.0 * room / self.budget if self.budget else 0.0
            return (f"{self.what} fits: {self.measure} {self.need} B of a {self.budget} B "
                    f"budget, headroom {room} B ({pct:.1f}%)")
        over = self.need - self.budget
        return (f"{self.what} does not fit: {self.measure} {self.need} B, budget "
                f"{self.budget} B, over by {over} B")


def flash_constant_bytes(c, flags: str) -> tuple[int, str]:
    """All flash constants of the emitted tree (weights, biases, requant params, tables)."""
    if c.const_bytes:
        return c.const_bytes, "all constants of the emitted C"
    from tinygen.codegen.emit import render_tree
    try:
        render_tree(c, flags)  # sets c.const_bytes
    except TinygenError as exc:
        return c.weights_bytes, f"weights and biases only (C not rendered: {exc.reason})"
    return c.const_bytes, "all constants of the emitted C"


def verdicts(c, budget_ram: int | None, budget_flash: int | None, flags: str) -> list[Verdict]:
    flash, _ = flash_constant_bytes(c, flags)
    return [Verdict("RAM", "arena", c.plan.arena_bytes, budget_ram, "--budget-ram"),
            Verdict("Flash", "constants", flash, budget_flash, "--budget-flash")]


def _table(header: list[str] | None, rows: list[list[str]],
           row_class: list[str] | None = None) -> str:
    head = "<tr>" + "".join(f"<th>{h}</th>" for h in header) + "</tr>\n" if header else ""
    body = []
    for i, r in enumerate(rows):
        cls = f' class="{row_class[i]}"' if row_class and row_class[i] else ""
        body.append(f"<tr{cls}>" + "".join(r) + "</tr>")
    return f"<table>{head}" + "\n".join(body) + "</table>"


def _n(v) -> str:
    return f'<td class="n">{"-" if v is None else v}</td>'


def _s(v) -> str:
    return f"<td>{_t(v)}</td>"


def _name(v) -> str:
    return f'<td class="name">{_t(v)}</td>'


def _model_section(c, flags: str) -> str:
    g = c.graph
    ios = [f"input {_t(io.onnx_name)}: {io.onnx_dtype} "
           f"[{'x'.join(map(str, g.tensors[io.name].shape))}]" for io in g.inputs]
    ios += [f"output {_t(io.onnx_name)}: {io.onnx_dtype} "
            f"[{'x'.join(map(str, g.tensors[io.name].shape))}]" for io in g.outputs]
    rows = [["model", _t(g.name)], ["source", _t(Path(g.source_path).name)],
            ["source sha256", f"<code>{_t(g.source_sha256)}</code>"],
            ["tinygen", _t(tinygen.__version__)], ["flags", f"<code>{_t(flags)}</code>"],
            ["ops (kernel calls)", str(sum(1 for op in g.ops if op.kind != "view"))],
            ["MACs per inference", str(c.macs)], ["inputs / outputs", "<br>".join(ios)]]
    return "<h2>Model</h2>\n" + _table(None, [[f"<th>{k}</th>", f"<td>{v}</td>"]
                                                   for k, v in rows])


def _budget_section(c, vs: list[Verdict], flags: str) -> str:
    css = {"fits": "fits", "does not fit": "nofit", "no budget": "nobudget"}
    lines = [f'<div class="verdict {css[v.status]}">{_t(v.line())}</div>' for v in vs]
    fig = plan_figures(c)
    _, flash_what = flash_constant_bytes(c, flags)
    rows = [["arena (RAM)", fig.arena, "activations and scratch, all regions"],
            ["lower bound", fig.lower_bound, "largest sum of live buffers at one step, "
             "this order"],
            ["planner loss", fig.loss, "arena - lower bound"],
            ["no reuse", fig.naive, "every buffer its own range"],
            ["weights", c.weights_bytes, "weight and bias tensors the ops read"],
            ["flash constants", vs[1].need, flash_what]]
    if fig.external_bytes:
        rows.insert(1, ["caller buffers", fig.external_bytes,
                        "--io external: inputs/outputs outside the arena, not counted"])
    table = _table(["figure", "bytes", "what it counts"],
                   [[_s(a), _n(b), _s(d)] for a, b, d in rows])
    note = ('<p class="note">RAM counts the arena only (the stack and the caller\'s own '
            'buffers come on top; <code>tinygen emulate</code> measures the stack). Flash '
            'counts constants only (the code of the kernels comes on top). Over budget the '
            'report is still written and <code>tinygen report</code> exits 0.</p>')
    return "<h2>Budgets</h2>\n" + "\n".join(lines) + "\n" + table + "\n" + note


def _ops_section(c) -> str:
    g, plan = c.graph, c.plan
    n = len(plan.order)
    ids = {r.buf.name: r.ident for r in buffer_rows(c)}
    live = {r.step: r.live_bytes for r in live_profile(c)}
    rows = []
    for s, k in enumerate(plan.order):
        op = g.ops[k]
        out = g.tensors[op.outputs[0]]
        buf = plan.buffers[plan.owner[op.outputs[0]]]
        where = ids.get(buf.name, buf.external or "-")
        kern = kernel_of(op) + (f" (alias of {where})" if op.kind == "view" else "")
        shape = "x".join(map(str, out.shape)) + (f" {out.layout}" if out.layout != "plain"
                                                 else "")
        rows.append([_n(step_label(s, n)), _n(k), _s(kern), _name(op.name), _s(op.onnx_op),
                     _s(shape), _n(c.per_op_macs[k]), _n(out.nbytes), _s(where),
                     _n(live[s])])
    return "<h2>Ops in execution order</h2>\n" + _table(
        ["step", "op", "kernel", "ONNX node", "ONNX op", "output shape", "MACs", "output B",
         "buffer", "live B"], rows)


def _buffers_section(c) -> str:
    n = len(c.plan.order)
    rows = [[_s(r.ident), _name(r.buf.name), _n(r.buf.size), _n(r.buf.offset),
             _s(r.buf.region), _s(f"{step_label(r.buf.first, n)}..{step_label(r.buf.last, n)}"),
             _s(", ".join(r.writers)), _s(", ".join(r.readers))] for r in buffer_rows(c)]
    return "<h2>Arena buffers</h2>\n" + _table(
        ["id", "buffer", "bytes", "offset", "region", "lifetime (steps)", "written by",
         "read by"], rows)


def best_line(c, results) -> str:
    """Which planner and order give the smallest arena, against this build."""
    ok = [r for r in results if r.arena is not None]
    if not ok:
        return "No planner and order fits the given regions."
    best = min(ok, key=lambda r: r.arena)
    this = c.plan.arena_bytes
    if best.arena >= this:
        return f"This build's arena, {this} B, is the smallest of these."
    return (f"Smallest arena: {best.arena} B with --planner {best.planner} --order "
            f"{best.order}, {this - best.arena} B below this build's {this} B.")


def _planner_section(c) -> str:
    rows, classes = [], []
    results = compare_planners(c)
    best = min((r.arena for r in results if r.arena is not None), default=None)
    for r in results:
        this = r.planner == c.plan.planner and r.order == c.options.order
        loss = None if r.arena is None else r.arena - r.lower_bound
        arena = _n(r.arena) if r.arena != best else f'<td class="n"><b>{r.arena}</b></td>'
        rows.append([_s(r.planner), _s(r.order), arena, _n(r.lower_bound), _n(loss),
                     _n(r.naive), _n(r.arena_no_inplace),
                     _s(r.error or ("this build" if this else ""))])
        classes.append("this" if this else "")
    note = ('<p class="note">Each row re-plans this graph with the other build flags '
            'unchanged (limits lifted). The lower bound belongs to each row\'s order: a '
            're-ordering can go below the given-order bound, a planner never below its own '
            'order\'s bound. Smallest arena in bold.</p>')
    return ("<h2>Planners and orders</h2>\n" + f"<p>{_t(best_line(c, results))}</p>\n" +
            _table(["planner", "order", "arena B", "lower bound B", "loss B", "no reuse B",
                    "arena B without in-place", "note"], rows, classes) + "\n" + note)


def render_report(c, budget_ram: int | None, budget_flash: int | None, flags: str) -> str:
    """The whole HTML document as text (deterministic for the same model and flags)."""
    return _render(c, verdicts(c, budget_ram, budget_flash, flags), flags)


def _render(c, vs: list[Verdict], flags: str) -> str:
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             f"<title>tinygen report: {_t(c.graph.name)}</title>",
             f"<style>{CSS}</style></head><body>",
             f"<h1>tinygen report: {_t(c.graph.name)}</h1>",
             f'<p class="note">{_t(Path(c.graph.source_path).name)}, tinygen '
             f"{_t(tinygen.__version__)}</p>",
             _budget_section(c, vs, flags), _model_section(c, flags),
             "<h2>Arena over time</h2>",
             '<p class="note">x: step in execution order; y: byte offset; one rectangle per '
             "buffer (hover for its name). Dashed red: lower bound; green: live bytes; "
             "shaded: the peak step.</p>",
             f'<div class="picture">{plan_svg(c)}</div>',
             _buffers_section(c), _ops_section(c), _planner_section(c),
             "</body></html>"]
    return "\n".join(parts) + "\n"


def write_report(c, path: str, budget_ram: int | None, budget_flash: int | None,
                 flags: str) -> list[str]:
    """Write the report to `path`; returns the verdict lines (also in the report)."""
    vs = verdicts(c, budget_ram, budget_flash, flags)
    try:
        Path(path).write_text(_render(c, vs, flags), encoding="utf-8")
    except OSError as exc:
        raise TinygenError(f"cannot write {path}: {exc.strerror}") from None
    return [v.line() for v in vs]
