"""The arena plan as figures, a text table (`tinygen plan`) and an SVG picture.

Steps are positions in the execution order (`plan.order`, views included). Step -1 is the
caller writing the inputs and step len(order) the caller reading the outputs, as in
tinygen.plan.lifetimes. "Live bytes" at a step is the sum of the sizes of the arena buffers
whose lifetime contains the step; its largest value is the lower bound for this order.
Names from the ONNX file are shown as printable ASCII only (`printable`).
"""
from __future__ import annotations

import html
from dataclasses import dataclass, replace

from tinygen.compiler import plan_arena
from tinygen.errors import TinygenError
from tinygen.plan import PLANNERS
from tinygen.plan.lifetimes import Buffer

ORDERS = ("given", "min-peak")


def printable(text: str) -> str:
    """Printable ASCII only: anything else becomes \\xNN or \\uNNNN (backslash doubled)."""
    out = []
    for ch in str(text):
        code = ord(ch)
        if ch == "\\":
            out.append("\\\\")
        elif 32 <= code < 127:
            out.append(ch)
        elif code < 256:
            out.append(f"\\x{code:02x}")
        else:
            out.append(f"\\u{code:04x}")
    return "".join(out)


# Suffixes quantizers append to tensor names; dropped first when a name must be shortened.
NAME_DECOR = ("_QuantizeLinear_Output", "_DequantizeLinear_Output", "_QuantizeLinear",
              "_DequantizeLinear", "_quantized", "_output_0")


def short_name(text: str, width: int = 32) -> str:
    """`printable(text)` cut to `width`: decoration suffixes, then leading path parts, then
    the middle go first (the end of a name tells most)."""
    s = printable(text)
    if len(s) <= width:
        return s
    stripped = True
    while stripped and len(s) > width:
        stripped = False
        for decor in NAME_DECOR:
            if s.endswith(decor) and len(s) > len(decor):
                s, stripped = s[: -len(decor)], True
    parts = s.split("/")
    while len(s) > width and len(parts) > 2:
        parts = parts[1:] if parts[0] == ".." else ["..", *parts[2:]]
        s = "/".join(parts)
    if len(s) <= width:
        return s
    head = (width - 2) // 3
    return s[:head] + ".." + s[len(s) - (width - 2 - head):]


def kernel_of(op) -> str:
    """The C function an op runs ('view' runs nothing; 'copy' is a memcpy)."""
    if "call" in op.attrs:
        return op.attrs["call"].func
    return "memcpy" if op.kind == "copy" else op.kind


def step_label(step: int, steps: int) -> str:
    return "in" if step < 0 else ("out" if step >= steps else str(step))


@dataclass
class BufferRow:
    """One arena buffer with a short id and who touches it (step labels)."""

    ident: str  # b0, b1, ... in execution order
    buf: Buffer
    base: int  # where the buffer's region starts when regions are stacked end to end
    writers: list[str]
    readers: list[str]


@dataclass
class StepRow:
    """One step of the execution order and the arena buffers live during it."""

    step: int
    op_index: int | None  # index into graph.ops; None for the caller's steps
    kernel: str
    node: str  # ONNX node name, raw (escape before showing)
    onnx_op: str
    macs: int
    live_bytes: int
    live: list[str]  # buffer ids


@dataclass
class PlanFigures:
    arena: int
    lower_bound: int
    naive: int
    loss: int  # arena - lower bound: what the offset assignment (and alignment) costs
    peak: StepRow
    external_bytes: int  # caller-owned input/output buffers (--io external), not in the arena


def region_bases(plan) -> dict[str, int]:
    """Start of each region when the regions are drawn one after another."""
    bases, at = {}, 0
    for r in plan.regions:
        bases[r.name] = at
        at += r.used
    return bases


def _dedupe(items: list[str]) -> list[str]:
    return list(dict.fromkeys(items))


def buffer_rows(c) -> list[BufferRow]:
    """Arena buffers in execution order (first step, then last, then name)."""
    plan, g = c.plan, c.graph
    writers: dict[str, list[str]] = {b: [] for b in plan.buffers}
    readers: dict[str, list[str]] = {b: [] for b in plan.buffers}
    for io in g.inputs:
        writers[plan.owner[io.name]].append("caller")
    for s, k in enumerate(plan.order):
        op = g.ops[k]
        if op.kind == "view":  # an alias: touches no memory
            continue
        for t in op.inputs:
            if t in plan.owner:
                readers[plan.owner[t]].append(str(s))
        for t in op.outputs:
            writers[plan.owner[t]].append(str(s))
    for io in g.outputs:
        readers[plan.owner[io.name]].append("caller")
    for b in plan.buffers.values():
        if b.scratch_of is not None:  # a kernel's scratch: written and read at its step
            writers[b.name].append(str(b.first))
            readers[b.name].append(str(b.first))
    bases = region_bases(plan)
    arena = sorted((b for b in plan.buffers.values() if b.external is None),
                   key=lambda b: (b.first, b.last, b.name))
    return [BufferRow(f"b{i}", b, bases.get(b.region, 0), _dedupe(writers[b.name]),
                      _dedupe(readers[b.name])) for i, b in enumerate(arena)]


def live_profile(c) -> list[StepRow]:
    """Live arena bytes at every step from -1 (inputs) to len(order) (outputs)."""
    plan, g = c.plan, c.graph
    rows = buffer_rows(c)
    n = len(plan.order)
    out = []
    for s in range(-1, n + 1):
        live = [r for r in rows if r.buf.first <= s <= r.buf.last]
        if 0 <= s < n:
            k = plan.order[s]
            op = g.ops[k]
            kern, node, onnx_op, macs = kernel_of(op), op.name, op.onnx_op, c.per_op_macs[k]
        else:
            k, kern, node, onnx_op, macs = None, "caller", "", "", 0
        out.append(StepRow(s, k, kern, node, onnx_op, macs, sum(r.buf.size for r in live),
                           [r.ident for r in live]))
    return out


def plan_figures(c) -> PlanFigures:
    plan = c.plan
    prof = live_profile(c)
    peak = max(prof, key=lambda r: r.live_bytes)  # first of equal peaks
    external = sum(b.size for b in plan.buffers.values() if b.external is not None)
    return PlanFigures(plan.arena_bytes, plan.lower_bound, plan.naive,
                       plan.arena_bytes - plan.lower_bound, peak, external)


# -- text ---------------------------------------------------------------------------------

def _columns(header: list[str], rows: list[list], right: set[int]) -> list[str]:
    cells = [header, *[[str(v) for v in r] for r in rows]]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    lines = []
    for r in cells:
        parts = [v.rjust(w) if i in right else v.ljust(w)
                 for i, (v, w) in enumerate(zip(r, widths, strict=True))]
        lines.append("  " + "  ".join(parts).rstrip())
    return lines


def _few(items: list[str], keep: int = 5) -> str:
    if not items:
        return "-"
    shown = ",".join(items[:keep])
    return shown + (f",+{len(items) - keep}" if len(items) > keep else "")


def _peak_text(fig: PlanFigures, steps: int) -> str:
    p = fig.peak
    where = {"in": "before the first op (inputs)", "out": "after the last op (outputs)"}
    lbl = step_label(p.step, steps)
    at = where.get(lbl, f"step {lbl}, {p.kernel} '{short_name(p.node, 40)}'")
    return f"{at}: {' + '.join(p.live) or 'nothing'} = {p.live_bytes} B"


def plan_table(c) -> str:
    """Readable text for `tinygen plan`: buffers, totals, and one line per step."""
    plan, g = c.plan, c.graph
    n = len(plan.order)
    rows = buffer_rows(c)
    fig = plan_figures(c)
    out = [f"arena plan for {short_name(g.name, 40)} "
           f"({short_name(g.source_path.rsplit('/', 1)[-1], 40)}): planner {plan.planner}, "
           f"order {c.options.order}, align {plan.align}, in-place "
           f"{'on' if c.options.inplace else 'off'}, io {c.options.io}", "",
           "buffers (execution order; lifetime in steps, 'in'/'out' = the caller)"]
    table = [[r.ident, short_name(r.buf.name), r.buf.size, r.buf.offset, r.buf.region,
              f"{step_label(r.buf.first, n)}..{step_label(r.buf.last, n)}",
              _few(r.writers), _few(r.readers), len(r.buf.tensors)] for r in rows]
    out += _columns(["id", "buffer", "bytes", "offset", "region", "lifetime", "written by",
                     "read by", "tensors"], table, {2, 3, 8})
    ext = [b for b in plan.buffers.values() if b.external is not None]
    if ext:
        out += ["", "outside the arena (--io external, the caller's buffers)"]
        out += _columns(["buffer", "bytes", "role"],
                        [[short_name(b.name), b.size, b.external] for b in ext], {1})
    regions = ""
    if len(plan.regions) > 1 or plan.regions[0].capacity is not None:
        regions = ", ".join(f"{r.name} {r.used} B" + (f" of {r.capacity}" if r.capacity else "")
                            for r in plan.regions)
    out += ["", "totals",
            f"  arena         {fig.arena:>9} B   {regions}".rstrip(),
            f"  lower bound   {fig.lower_bound:>9} B   largest sum of live buffers at one step "
            "(this order)",
            f"  no reuse      {fig.naive:>9} B   every buffer its own aligned range",
            f"  planner loss  {fig.loss:>9} B   arena - lower bound (placement and alignment)",
            f"  placement     {plan.winner or plan.planner}"
            + (f" won ({', '.join(f'{k} {v} B' for k, v in plan.tried.items())})"
               if plan.tried else "")
            + (", proven optimal" if plan.optimal else ", not proven optimal"),
            *(f"                {note}" for note in plan.notes),
            f"  peak          {_peak_text(fig, n)}"]
    if fig.external_bytes:
        out.append(f"  external      {fig.external_bytes:>9} B   caller's input/output buffers")
    out += ["", "steps"]
    steps = [[step_label(r.step, n), "-" if r.op_index is None else r.op_index, r.kernel,
              short_name(r.node) or "-", r.onnx_op or "-", r.macs, r.live_bytes,
              " ".join(r.live) + ("  <- peak" if r.step == fig.peak.step else "")]
             for r in live_profile(c)]
    out += _columns(["step", "op", "kernel", "ONNX node", "ONNX op", "MACs", "live B",
                     "live buffers"], steps, {1, 5, 6})
    return "\n".join(out)


# -- planner comparison -------------------------------------------------------------------

@dataclass
class PlannerRow:
    planner: str
    order: str
    arena: int | None  # None: the plan failed (e.g. does not fit the --region sizes)
    lower_bound: int | None
    naive: int | None
    arena_no_inplace: int | None
    lower_bound_no_inplace: int | None
    error: str = ""


def _replan(c, **changes):
    opts = replace(c.options, arena_limit=None, flash_limit=None, **changes)
    try:
        return plan_arena(c.graph, opts), ""
    except TinygenError as exc:
        return None, exc.reason


def compare_planners(c, with_no_inplace: bool = True) -> list[PlannerRow]:
    """Re-plan the compiled graph with every planner and order (limits lifted)."""
    rows = []
    for order in ORDERS:
        for planner in PLANNERS:
            plan, err = _replan(c, planner=planner, order=order)
            alt = None
            if with_no_inplace:
                alt, _ = _replan(c, planner=planner, order=order, inplace=False)
            alt_arena, alt_bound = (alt.arena_bytes, alt.lower_bound) if alt else (None, None)
            if plan is None:
                rows.append(PlannerRow(planner, order, None, None, None, alt_arena, alt_bound,
                                       err))
            else:
                rows.append(PlannerRow(planner, order, plan.arena_bytes, plan.lower_bound,
                                       plan.naive, alt_arena, alt_bound))
    return rows


# -- SVG ----------------------------------------------------------------------------------

FILLS = ("#a6cee3", "#fdbf6f", "#b2df8a", "#cab2d6", "#fb9a99", "#ffff99", "#8dd3c7",
         "#d9d9d9", "#bebada", "#fccde5")
LIVE = "#0b7a5a"  # live-bytes line
PEAK = "#b35900"  # peak step marker
REGION = "#7a1f7a"  # region boundaries
HALO = 'stroke="#ffffff" stroke-width="3" stroke-opacity="0.8" paint-order="stroke"'
CHAR_W = 6.0  # approximate width of one character at font-size 10, for label fitting


def _f(x: float) -> str:
    return f"{x:.1f}"


def _esc(text: str) -> str:
    """XML-escape text that is already printable ASCII (model names pass `printable` first)."""
    return html.escape(text, quote=True)


def _tick_step(top: int) -> int:
    """A 1-2-5 step giving at most 6 ticks up to `top`."""
    step = 1
    while True:
        for m in (1, 2, 5):
            if top / (step * m) <= 6:
                return step * m
        step *= 10


class _Canvas:
    """Byte and step coordinates to pixels for one picture."""

    def __init__(self, steps: int, ymax: int):
        self.steps = steps  # columns, including the caller's two
        self.cw = min(48.0, max(10.0, 760.0 / steps))
        self.left, self.top, self.ph = 80.0, 74.0, 340.0
        self.pw = self.cw * steps
        self.width = self.left + self.pw + 170.0
        self.height = self.top + self.ph + 92.0
        self.scale = self.ph / max(ymax, 1)

    def x(self, step: int) -> float:  # left edge of a step's column (step -1 is column 0)
        return self.left + (step + 1) * self.cw

    def y(self, nbytes: float) -> float:
        return self.top + self.ph - nbytes * self.scale


MIN_BUFFER_PX = 4.0  # a buffer of a few bytes in a large arena still shows as a bar


def _buffer_rect(cv: _Canvas, r: BufferRow, n: int, i: int) -> tuple[str, str | None]:
    """The rectangle of one buffer, and its label when one fits inside it. Buffers too small
    to see at this scale are drawn MIN_BUFFER_PX tall from their offset up."""
    b = r.buf
    x0, x1 = cv.x(b.first) + 1, cv.x(b.last + 1) - 1
    lo = r.base + (b.offset or 0)
    h = max(b.size * cv.scale, MIN_BUFFER_PX)
    y0 = cv.y(lo) - h
    tip = (f"{r.ident} {printable(b.name)}: {b.size} B at offset {b.offset} in {b.region}, "
           f"steps {step_label(b.first, n)}..{step_label(b.last, n)}")
    rect = (f'<rect class="buf" x="{_f(x0)}" y="{_f(y0)}" width="{_f(x1 - x0)}" '
            f'height="{_f(h)}" fill="{FILLS[i % len(FILLS)]}" stroke="#333" '
            f'stroke-width="0.8"><title>{_esc(tip)}</title></rect>')
    for label in (f"{r.ident} {b.size} B", f"{b.size}", r.ident):
        if len(label) * CHAR_W + 4 <= x1 - x0 and h >= 12:
            return rect, (f'<text x="{_f((x0 + x1) / 2)}" y="{_f(y0 + h / 2 + 3.5)}" '
                          f'text-anchor="middle" font-size="10" {HALO}>{_esc(label)}</text>')
    return rect, None


def _axes(cv: _Canvas, ymax: int, prof: list[StepRow], n: int) -> list[str]:
    out = []
    step = _tick_step(ymax)
    for v in range(0, ymax + 1, step):
        y = cv.y(v)
        out.append(f'<line x1="{_f(cv.left)}" y1="{_f(y)}" x2="{_f(cv.left + cv.pw)}" '
                   f'y2="{_f(y)}" stroke="#e4e4e4"/>')
        out.append(f'<text x="{_f(cv.left - 6)}" y="{_f(y + 3.5)}" text-anchor="end" '
                   f'font-size="10">{v}</text>')
    base = cv.top + cv.ph
    out.append(f'<line x1="{_f(cv.left)}" y1="{_f(base)}" x2="{_f(cv.left + cv.pw)}" '
               f'y2="{_f(base)}" stroke="#333"/>')
    out.append(f'<line x1="{_f(cv.left)}" y1="{_f(cv.top)}" x2="{_f(cv.left)}" '
               f'y2="{_f(base)}" stroke="#333"/>')
    out.append(f'<text x="{_f(cv.left - 58)}" y="{_f(cv.top + cv.ph / 2)}" font-size="11" '
               f'transform="rotate(-90 {_f(cv.left - 58)} {_f(cv.top + cv.ph / 2)})" '
               f'text-anchor="middle">byte offset</text>')
    every = 1 if cv.cw >= 14 else int(14 // cv.cw) + 1
    for r in prof:
        if (r.step + 1) % every:
            continue
        cx = cv.x(r.step) + cv.cw / 2
        out.append(f'<text x="{_f(cx)}" y="{_f(base + 13)}" text-anchor="middle" '
                   f'font-size="10">{step_label(r.step, n)}</text>')
        kern = r.kernel[3:] if r.kernel.startswith("tg_") else r.kernel
        ky = base + 22
        out.append(f'<text x="{_f(cx + 3)}" y="{_f(ky)}" font-size="9" fill="#555" '
                   f'text-anchor="end" transform="rotate(-60 {_f(cx + 3)} {_f(ky)})">'
                   f'{_esc(kern)}</text>')
    out.append(f'<text x="{_f(cv.left + cv.pw / 2)}" y="{_f(cv.height - 8)}" font-size="11" '
               f'text-anchor="middle">step (execution order; in/out = the caller)</text>')
    return out


def _hline(cv: _Canvas, value: int, label: str, style: str, dy: float) -> list[str]:
    y = cv.y(value)
    x1 = cv.left + cv.pw
    return [f'<line x1="{_f(cv.left)}" y1="{_f(y)}" x2="{_f(x1 + 4)}" y2="{_f(y)}" {style}/>',
            f'<text x="{_f(x1 + 8)}" y="{_f(y + dy)}" font-size="11">{_esc(label)}</text>']


def plan_svg(c) -> str:
    """The arena over time: x = step, y = byte offset, one rectangle per arena buffer.

    A dashed line marks the lower bound, a dark step line the live bytes at each step and a
    shaded column the peak step. Self-contained and deterministic (same model, same bytes).
    """
    plan = c.plan
    n = len(plan.order)
    rows, prof, fig = buffer_rows(c), live_profile(c), plan_figures(c)
    ymax = max(fig.arena, fig.lower_bound, 1)
    cv = _Canvas(n + 2, ymax)
    title = (f"arena plan: {short_name(c.graph.name, 40)} - planner {plan.planner}, order "
             f"{c.options.order}, align {plan.align}")
    sub = (f"arena {fig.arena} B, lower bound {fig.lower_bound} B (loss {fig.loss} B), "
           f"no reuse {fig.naive} B; peak at step {step_label(fig.peak.step, n)}")
    out = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{_f(cv.width)}" '
           f'height="{_f(cv.height)}" viewBox="0 0 {_f(cv.width)} {_f(cv.height)}" '
           'font-family="DejaVu Sans, Arial, Helvetica, sans-serif">',
           f'<rect class="bg" x="0" y="0" width="{_f(cv.width)}" height="{_f(cv.height)}" '
           'fill="#ffffff"/>',
           f'<text x="{_f(cv.left)}" y="22" font-size="14" font-weight="bold">{_esc(title)}'
           '</text>',
           f'<text x="{_f(cv.left)}" y="40" font-size="11">{_esc(sub)}</text>']
    for s in range(-1, n + 1, 2):  # shade every other column so steps are easy to follow
        out.append(f'<rect class="col" x="{_f(cv.x(s))}" y="{_f(cv.top)}" '
                   f'width="{_f(cv.cw)}" height="{_f(cv.ph)}" fill="#f5f5f5"/>')
    px = cv.x(fig.peak.step)
    out += _axes(cv, ymax, prof, n)
    labels = []
    drawn = sorted(range(len(rows)), key=lambda i: -rows[i].buf.size)  # small ones on top
    for i in drawn:
        rect, label = _buffer_rect(cv, rows[i], n, i)
        out.append(rect)
        labels += [label] if label else []
    if len(plan.regions) > 1:  # region boundaries, each region named just above its base
        for reg in plan.regions:
            base = region_bases(plan)[reg.name]
            y = cv.y(base)
            if base:
                out.append(f'<line x1="{_f(cv.left)}" y1="{_f(y)}" x2="{_f(cv.left + cv.pw)}" '
                           f'y2="{_f(y)}" stroke="{REGION}" stroke-width="1.2"/>')
            labels.append(f'<text x="{_f(cv.left + 4)}" y="{_f(y - 4)}" font-size="10" '
                          f'fill="{REGION}" {HALO}>region {_esc(reg.name)}</text>')
    path = " ".join(f"{'M' if i == 0 else 'L'}{_f(cv.x(r.step))} {_f(cv.y(r.live_bytes))} "
                    f"L{_f(cv.x(r.step + 1))} {_f(cv.y(r.live_bytes))}"
                    for i, r in enumerate(prof))
    out.append(f'<path class="live" d="{path}" fill="none" stroke="{LIVE}" stroke-width="1.6" '
               'stroke-opacity="0.9"/>')
    # the peak column: shaded over the buffers (as the legend shows it), its label above the
    # plot area, clear of the arena and lower-bound lines at the top
    out.append(f'<rect class="peak" x="{_f(px)}" y="{_f(cv.top)}" width="{_f(cv.cw)}" '
               f'height="{_f(cv.ph)}" fill="#ffd8a8" fill-opacity="0.45" stroke="{PEAK}" '
               'stroke-width="1.4" stroke-dasharray="3 2"/>')
    out.append(f'<text class="peak-label" x="{_f(px + cv.cw / 2)}" y="{_f(cv.top - 14)}" '
               f'text-anchor="middle" font-size="10" fill="{PEAK}" {HALO}>peak</text>')
    out += labels
    close = abs(fig.arena - fig.lower_bound) * cv.scale < 13
    out += _hline(cv, fig.arena, f"arena {fig.arena} B",
                  'stroke="#1f4e9a" stroke-width="1.4"', -4 if close else 4)
    out += _hline(cv, fig.lower_bound, f"lower bound {fig.lower_bound} B",
                  'stroke="#c0392b" stroke-width="1.4" stroke-dasharray="5 3"',
                  12 if close else 4)
    lx, ly = cv.left + cv.pw + 8, cv.top + cv.ph + 30
    out += [f'<path d="M{_f(lx)} {_f(ly)} H{_f(lx + 18)}" stroke="{LIVE}" stroke-width="1.6"/>',
            f'<text x="{_f(lx + 22)}" y="{_f(ly + 3.5)}" font-size="10">live bytes</text>',
            f'<rect x="{_f(lx)}" y="{_f(ly + 12)}" width="18" height="9" fill="#ffd8a8" '
            f'fill-opacity="0.45" stroke="{PEAK}" stroke-dasharray="3 2"/>',
            f'<text x="{_f(lx + 22)}" y="{_f(ly + 20)}" font-size="10">peak step</text>']
    out.append("</svg>")
    return "\n".join(out) + "\n"
