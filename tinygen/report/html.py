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
    MIN_BUFFER_PX,
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
       max-width: 1400px; color: #1b1b1b; padding: 0 16px; }
h1 { font-size: 22px; margin-bottom: 4px; }
h2 { font-size: 17px; margin-top: 28px; border-bottom: 1px solid #ccc; padding-bottom: 3px; }
table { border-collapse: collapse; font-size: 13px; margin: 6px 0; }
th, td { border: 1px solid #d0d0d0; padding: 3px 8px; text-align: left; vertical-align: top; }
th { background: #f0f0f0; }
td.n { text-align: right; font-variant-numeric: tabular-nums; font-family: monospace; }
td.name { font-family: monospace; overflow-wrap: anywhere; min-width: 13em; max-width: 420px; }
tr.this td { background: #eef5ff; }
td.top { background: #ffe3b3; font-weight: bold; text-align: right;
         font-variant-numeric: tabular-nums; font-family: monospace; }
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


@dataclass
class LayerFigures:
    """What the report shows per layer beyond the plan, when it was measured: the target
    cost (`--cpu`: instructions per kernel call, stack), the quantization error (SQNR per
    call) and the accuracy on labelled inputs. Keys are kernel-call indices."""

    cpu: str | None = None
    instructions: dict[int, int] | None = None
    stack_bytes: int | None = None
    target_flash_bytes: int | None = None
    quant: object | None = None      # tinygen.layer_error.QuantError
    accuracy: object | None = None   # tinygen.accuracy.Accuracy
    notes: list[str] | None = None


def stored_shape(t) -> str:
    """The storage shape as the C holds it, with axis letters for channels-last tensors."""
    dims = "x".join(map(str, t.storage_shape()))
    if t.layout == "channels_last" and len(t.shape) in (3, 4):
        return dims + (" (N W C)" if len(t.shape) == 3 else " (N H W C)")
    return dims


def per_call_flash(c, flags: str) -> list[int]:
    """Flash constants each kernel call adds to the emitted C (weights, biases, tables,
    parameters; a constant two calls share counts for the first)."""
    from tinygen.codegen.emit import TreeWriter
    try:
        return [call["const_bytes"] for call in TreeWriter(c, flags).context()["calls"]]
    except TinygenError:
        return []


def _top(values: dict[int, float], largest: bool = True) -> int | None:
    rated = {k: v for k, v in values.items() if v is not None}
    if not rated:
        return None
    return (max if largest else min)(rated, key=lambda k: rated[k])


def _hi(cell: str, on: bool) -> str:
    """A number cell shaded as the biggest of its column."""
    return cell.replace('<td class="n">', '<td class="top">', 1) if on else cell


def measure_layers(c, model_path: str, flags: str, samples, cpu: str | None = None,
                   float_model: str | None = None, inputs_path: str | None = None
                   ) -> LayerFigures:
    """Run what the per-layer columns need: the emulated core (cpu), the float reference
    (float_model, or a QDQ model's recovered float graph) and labelled accuracy."""
    from tinygen.accuracy import labelled_accuracy
    from tinygen.check import load_labels, run_check
    from tinygen.layer_error import quantization_error_or_note
    lf = LayerFigures(notes=[])
    if cpu is not None:
        from tinygen.target_check import emulate_compiled
        fig = emulate_compiled(c, samples[:2], cpu, flags)
        lf.cpu = cpu
        lf.instructions = {int(r["op"]): int(r["instructions"]) for r in fig["per_op"]}
        lf.stack_bytes, lf.target_flash_bytes = fig["stack_bytes"], fig["flash_bytes"]
        if not fig["bit_exact"]:
            lf.notes.append(f"the {cpu} build's outputs differ from the reference")
    lf.quant, note = quantization_error_or_note(c, model_path, samples, float_model)
    if note:
        lf.notes.append(note)
    if inputs_path and load_labels(inputs_path, len(samples)) is not None:
        res = run_check(c, model_path, samples, flags, against_ort=False)
        lf.accuracy = labelled_accuracy(c, model_path, inputs_path, samples, res.outputs,
                                        quant_error=lf.quant)
        lf.notes += lf.accuracy.notes
    return lf


def _ops_section(c, flags: str = "", lf: LayerFigures | None = None) -> str:
    import math
    g, plan = c.graph, c.plan
    lf = lf or LayerFigures()
    n = len(plan.order)
    ids = {r.buf.name: r.ident for r in buffer_rows(c)}
    live = {r.step: r.live_bytes for r in live_profile(c)}
    flash = per_call_flash(c, flags)
    sq = {lay.call: lay for lay in lf.quant.layers} if lf.quant is not None else {}
    steps, call_of = [], {}
    for s, k in enumerate(plan.order):
        if g.ops[k].kind != "view":
            call_of[s] = len(call_of)
        steps.append((s, k))
    instr = lf.instructions or {}
    # the biggest of each: memory (live bytes), flash, time (instructions), accuracy (drop)
    top_live = _top({s: live[s] for s, _ in steps})
    top_flash = _top({s: flash[call_of[s]] for s, _ in steps if s in call_of
                      and call_of[s] < len(flash)})
    top_time = _top({s: instr.get(call_of[s]) for s, _ in steps if s in call_of})
    drops = {s: sq[call_of[s]].drop_db for s, _ in steps if s in call_of and call_of[s] in sq}
    top_drop = _top({s: (1e9 if v is not None and math.isinf(v) else v)
                     for s, v in drops.items()})
    head = ["step", "op", "kernel", "ONNX node", "ONNX op", "stored as", "MACs", "output B",
            "buffer", "live B", "flash B"]
    if lf.instructions is not None:
        head += ["instructions", "instr/MAC"]
    if lf.quant is not None:
        head += ["SQNR dB", "drop dB"]
    rows = []
    for s, k in steps:
        op = g.ops[k]
        out = g.tensors[op.outputs[0]]
        buf = plan.buffers[plan.owner[op.outputs[0]]]
        where = ids.get(buf.name, buf.external or "-")
        if op.kind == "view":
            same = " with its input's scale" if op.onnx_op == "QuantizeLinear" else ""
            kern = f"no code: same bytes as {where}{same}"
        else:
            kern = kernel_of(op)
        call = call_of.get(s)
        row = [_n(step_label(s, n)), _n(k), _s(kern), _name(op.name), _s(op.onnx_op),
               _s(stored_shape(out)), _n(c.per_op_macs[k]), _n(out.nbytes), _s(where),
               _hi(_n(live[s]), s == top_live),
               _hi(_n(flash[call] if call is not None and call < len(flash) else None),
                   s == top_flash)]
        if lf.instructions is not None:
            ins = instr.get(call) if call is not None else None
            macs = c.per_op_macs[k]
            row += [_hi(_n(ins), s == top_time),
                    _n(f"{ins / macs:.2f}" if ins is not None and macs else None)]
        if lf.quant is not None:
            lay = sq.get(call) if call is not None else None
            fmt = _db_text
            row += [_n(fmt(lay.sqnr_db) if lay else None),
                    _hi(_n(fmt(lay.drop_db) if lay else None), s == top_drop)]
        rows.append(row)
    legend = ("Shaded: the biggest of each column - live bytes (memory), flash B (constants "
              "of that call), instructions (time on the emulated core) and the SQNR drop "
              "(where accuracy is lost most: the call's SQNR below its inputs'). Stored as: the "
              "output's dimensions in the order the C stores them.")
    return ("<h2>Ops in execution order</h2>\n" + _table(head, rows) +
            f'\n<p class="note">{_t(legend)}</p>')


def _db_text(v) -> str | None:
    import math
    if v is None:
        return None
    return "exact" if math.isinf(v) else f"{v:.1f}"


def _insight_section(c, lf: LayerFigures | None) -> str:
    """Target cost, quantization error and accuracy summaries (what was measured)."""
    if lf is None:
        return ""
    parts = []
    if lf.cpu is not None:
        total = sum((lf.instructions or {}).values())
        rows = [["CPU (emulated)", _t(lf.cpu)], ["instructions per inference", str(total)],
                ["instructions per MAC", f"{total / c.macs:.2f}" if c.macs else "-"],
                ["stack B", _t(lf.stack_bytes)],
                ["flash B (code + constants, measured)", _t(lf.target_flash_bytes)]]
        parts.append("<h2>Target cost</h2>\n" + _table(None, [[f"<th>{a}</th>", f"<td>{b}</td>"]
                                                              for a, b in rows]) +
                     '\n<p class="note">Instructions are counted exactly by the emulator '
                     "(not cycles; docs/target.md). Stack is the deepest the model's own "
                     "frames reach in one run.</p>")
    if lf.quant is not None:
        q = lf.quant
        w = q.worst
        lines = [f"Float reference: {q.source}; {q.samples} samples.",
                 "Outputs: " + ", ".join(f"{k} {_db_text(v) or '-'} dB"
                                         for k, v in q.outputs.items()) +
                 "; inputs: " + ", ".join(f"{k} {_db_text(v) or '-'} dB"
                                          for k, v in q.inputs.items()) + "."]
        if w is not None:
            lines.append(f"Most lost at kernel call {w.call} ({w.kernel} from ONNX node "
                         f"'{w.node}', {w.onnx_op}): {_db_text(w.sqnr_db)} dB after "
                         f"{_db_text(w.input_sqnr_db)} dB at its inputs.")
        parts.append("<h2>Quantization error</h2>\n" + "".join(f"<p>{_t(x)}</p>"
                                                                 for x in lines) +
                     '\n<p class="note">SQNR = 10 log10(sum f^2 / sum (f - r)^2) of each '
                     "int8 tensor r (dequantized) against its float counterpart f; how a "
                     "layer is matched: docs/numerics.md.</p>")
    if lf.accuracy is not None:
        a = lf.accuracy
        rows = [[_s(k), _n(f"{100 * v:.2f}%" if v is not None else None)]
                for k, v in a.top1.items()]
        rows += [[_s(f"agreement {k}"), _n(f"{100 * v:.2f}%")] for k, v in a.agreement.items()]
        parts.append(f"<h2>Accuracy ({a.samples} labelled samples, {a.classes} classes)</h2>\n"
                     + _table(["top-1", ""], rows))
    for note in lf.notes or []:
        parts.append(f'<p class="note">{_t(note)}</p>')
    return "\n".join(parts)


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


def render_report(c, budget_ram: int | None, budget_flash: int | None, flags: str,
                  layers: LayerFigures | None = None) -> str:
    """The whole HTML document as text (deterministic for the same model and flags)."""
    return _render(c, verdicts(c, budget_ram, budget_flash, flags), flags, layers)


def _render(c, vs: list[Verdict], flags: str, layers: LayerFigures | None = None) -> str:
    parts = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
             f"<title>tinygen report: {_t(c.graph.name)}</title>",
             f"<style>{CSS}</style></head><body>",
             f"<h1>tinygen report: {_t(c.graph.name)}</h1>",
             f'<p class="note">{_t(Path(c.graph.source_path).name)}, tinygen '
             f"{_t(tinygen.__version__)}</p>",
             _budget_section(c, vs, flags), _model_section(c, flags),
             "<h2>Arena over time</h2>",
             '<p class="note">x: step in execution order; y: byte offset; one rectangle per '
             "buffer (hover for its name; buffers too small for the scale are drawn "
             f"{MIN_BUFFER_PX:g} px tall). Dashed red: lower bound; green: live bytes; "
             "shaded: the peak step.</p>",
             f'<div class="picture">{plan_svg(c)}</div>',
             _ops_section(c, flags, layers), _insight_section(c, layers),
             _buffers_section(c), _planner_section(c),
             "</body></html>"]
    return "\n".join(parts) + "\n"


def write_report(c, path: str, budget_ram: int | None, budget_flash: int | None,
                 flags: str, layers: LayerFigures | None = None, protect=()) -> list[str]:
    """Write the report to `path` (whole or not at all, never over one of the input files
    in `protect`); returns the verdict lines (also in the report)."""
    from tinygen.codegen.output import write_file
    vs = verdicts(c, budget_ram, budget_flash, flags)
    write_file(path, _render(c, vs, flags, layers), protect=protect, what="report")
    return [v.line() for v in vs]
