"""Row streaming: run chains of spatial layers a band of output rows at a time.

A run is a chain of spatial kernels (`Kernel.rows`: conv, 1x1 conv, depthwise once it has
rows) where each intermediate tensor has the next layer as its only reader. Executed band
by band, each intermediate only needs the rows its reader still has to see, so it becomes a
ring of a few rows (k_h rows, plus the stride) instead of the whole tensor. Every row of
every layer is computed once, by exactly one call: no MAC is repeated.

Needs: lowered params (passes/params.py) with the requant forms chosen. Leaves: each chosen
run replaced by one op of kind "stream" at its first layer's place; its inputs are the run's
input and the members' constants, its outputs the run's output, then one ring tensor per
intermediate and, when a member needs it, one scratch tensor, so the planner and the
verifier see the rings as ordinary (small) buffers live at that op's step. attrs["run"] is
the `StreamRun`: the members with their ring parameters and the band schedule.
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace

from tinygen.ir import CHANNELS_LAST, Graph, Op, Tensor
from tinygen.kernels import KERNELS
from tinygen.reference.rows import input_rows

# Band heights (output rows of a run's last layer per band) the search tries.
BAND_HEIGHTS = (1, 2, 4, 8, 16)
# Extra instructions one more kernel call costs (prologue, parameter loads, row setup);
# estimated from the Cortex-M4 counts of small calls (common practice: a call of a
# ~20-register kernel spends on the order of 100-200 instructions outside its loops).
CALL_INSTRUCTIONS = 200
# The estimated extra instructions of all runs may be at most this fraction of the model's
# MACs (the M4 kernels take one instruction per MAC or more, so this bounds the overhead
# at about this fraction of the instructions as well).
OVERHEAD_LIMIT = 0.02
# Candidate runs the real planner is asked about per round (the rest are ranked by the
# lower bound of their buffers, which costs no placement).
PLANNER_TRIES = 3


@dataclass
class Member:
    """One layer of a run: the op it came from and its call with ring parameters."""

    op: Op
    call: object  # passes.params.KernelCall, params with x_ring / y_ring set
    x: str  # tensor it reads as input 0: the run's input or a ring
    y: str  # tensor it writes: a ring or the run's output


@dataclass
class StreamRun:
    """A streamed run: members in order, band height and per band the rows of each member."""

    members: list[Member]
    band: int
    rows: list[list[tuple[int, int]]]  # [band][member] = (row0, row1), possibly empty
    rings: list[str]  # ring tensor between member i and i+1
    replaced: list[str]  # the whole-tensor intermediates the rings stand for
    scratch: str | None  # tensor name of the scratch shared by the members' calls
    scratch_bytes: int

    @property
    def calls(self) -> int:
        """Kernel calls the band loop makes (non-empty row ranges)."""
        return sum(1 for band in self.rows for r0, r1 in band if r1 > r0)

    @property
    def extra_calls(self) -> int:
        """Calls beyond one per member (what whole-tensor execution makes)."""
        return self.calls - len(self.members)

    def ring_rows(self) -> list[int]:
        return [m.call.params.y_ring for m in self.members[:-1]]


def estimated_overhead(run: StreamRun) -> int:
    """Extra instructions the band loop is estimated to cost over whole-tensor calls."""
    return run.extra_calls * CALL_INSTRUCTIONS


def band_schedule(params: list, band: int) -> tuple[list[list[tuple[int, int]]], list[int]]:
    """Rows each layer computes per band, and the ring rows each intermediate needs.

    Band b asks the last layer for output rows [b*band, (b+1)*band); going backwards, each
    layer computes from where it stopped up to the last input row its reader needs. A ring
    between layer i and i+1 must hold, at each band, every row from the first one layer i+1
    reads up to the last one layer i has written, so no row still to be read is overwritten.
    """
    m = len(params)
    done = [0] * m
    height = params[-1].out_h
    rows: list[list[tuple[int, int]]] = []
    ring = [1] * (m - 1)
    for start in range(0, height, band):
        need = done[:]
        need[-1] = min(start + band, height)
        for i in range(m - 1, 0, -1):
            if need[i] > done[i]:
                _, end, _ = input_rows(params[i], done[i], need[i])
                need[i - 1] = max(done[i - 1], end)
        for i in range(m - 1):
            if need[i + 1] > done[i + 1]:
                first, _, _ = input_rows(params[i + 1], done[i + 1], need[i + 1])
                ring[i] = max(ring[i], need[i] - first)
        rows.append(list(zip(done, need, strict=True)))
        done = need
    ring = [min(r, p.out_h) for r, p in zip(ring, params, strict=False)]
    return rows, ring


def _streamable(graph: Graph, op: Op) -> bool:
    call = op.attrs.get("call")
    if call is None or not KERNELS[call.func].rows or call.batch != 1:
        return False
    p = call.params
    y = graph.tensors[call.args[-1]]
    x = graph.tensors[call.args[0]]
    return (p.n == 1 and p.out_h > 1 and len(y.shape) == 4 and y.layout == CHANNELS_LAST
            and len(x.shape) == 4 and x.layout == CHANNELS_LAST and not p.x_ring
            and not p.y_ring)


def find_chains(graph: Graph) -> list[list[int]]:
    """Maximal chains of streamable ops (indices) linked by single-reader intermediates."""
    index = {id(op): k for k, op in enumerate(graph.ops)}
    nxt: dict[int, int] = {}
    for k, op in enumerate(graph.ops):
        if not _streamable(graph, op):
            continue
        t = op.attrs["call"].args[-1]
        readers = [r for r in graph.ops if t in r.inputs]
        if len(readers) != 1 or graph.is_graph_output(t) or graph.is_graph_input(t):
            continue
        r = readers[0]
        if not _streamable(graph, r) or r.attrs["call"].args[0] != t \
                or r.inputs.count(t) != 1 or t in r.attrs["call"].args[1:]:
            continue
        nxt[k] = index[id(r)]
    heads = set(nxt) - set(nxt.values())
    chains = []
    for h in sorted(heads):
        chain = [h]
        while chain[-1] in nxt:
            chain.append(nxt[chain[-1]])
        chains.append(chain)
    return chains


def make_run(graph: Graph, chain: list[int], band: int, tag: str) -> tuple[StreamRun, dict]:
    """The run of ops `chain` with band height `band`; also the new tensors it needs."""
    ops = [graph.ops[k] for k in chain]
    params = [op.attrs["call"].params for op in ops]
    rows, ring = band_schedule(params, band)
    new_tensors: dict[str, Tensor] = {}
    rings, replaced = [], []
    for i, op in enumerate(ops[:-1]):
        t = graph.tensors[op.attrs["call"].args[-1]]
        n, c, _, w = t.shape
        name = f"{t.name}:ring{tag}"
        new_tensors[name] = Tensor(name, (n, c, ring[i], w), t.dtype, t.quant, None, t.layout)
        rings.append(name)
        replaced.append(t.name)
    members = []
    for i, op in enumerate(ops):
        call = op.attrs["call"]
        p = replace(call.params, x_ring=ring[i - 1] if i else 0,
                    y_ring=ring[i] if i < len(ops) - 1 else 0)
        x = rings[i - 1] if i else call.args[0]
        y = rings[i] if i < len(ops) - 1 else call.args[-1]
        members.append(Member(op, replace(call, params=p, args=[x, *call.args[1:-1], y]), x, y))
    scratch = max(KERNELS[m.call.func].scratch_bytes(m.call.params) for m in members)
    scratch_name = None
    if scratch:
        scratch_name = f"{ops[-1].outputs[0]}:band-scratch{tag}"
        new_tensors[scratch_name] = Tensor(scratch_name, (scratch,), "int8")
    return StreamRun(members, band, rows, rings, replaced, scratch_name, scratch), new_tensors


def apply_runs(graph: Graph, runs: list[tuple[list[int], int]]) -> Graph:
    """A copy of graph with each (chain, band) replaced by one stream op (chains disjoint)."""
    tensors = dict(graph.tensors)
    first_of = {chain[0]: (chain, band) for chain, band in runs}
    inside = {k for chain, _ in runs for k in chain}
    ops: list[Op] = []
    for k, op in enumerate(graph.ops):
        if k in first_of:
            chain, band = first_of[k]
            run, new = make_run(graph, chain, band, f"{len(ops)}")
            tensors.update(new)
            for name in run.replaced:
                del tensors[name]
            members = {m.op.attrs["call"].args[-1] for m in run.members}
            consts = [t for m in run.members for t in m.op.inputs
                      if t not in members and t != run.members[0].x]
            outs = [run.members[-1].y, *run.rings] + ([run.scratch] if run.scratch else [])
            last = run.members[-1].op
            ops.append(Op("stream", [run.members[0].x, *consts], outs, {"run": run},
                          last.name, last.onnx_op))
        elif k not in inside:
            ops.append(op)
    return replace(graph, ops=ops, tensors=tensors)


def _subruns(chain: list[int]) -> list[list[int]]:
    return [chain[a:b] for a in range(len(chain)) for b in range(a + 2, len(chain) + 1)]


def stream_layers(graph: Graph, bound_of: Callable[[Graph], int],
                  arena_of: Callable[[Graph], int], macs: int) -> Graph:
    """Pick the runs (and band heights) that lower the arena, under the overhead limit.

    Greedy rounds: every sub-run of every chain not yet taken, at every band height, is
    ranked by the lower bound of its buffers (bound_of), then by estimated overhead; the
    best few are planned for real (arena_of, the planner as a black box) and the first that
    makes the arena smaller is kept. Stops when no candidate helps. Returns `graph` itself
    when no run pays off.
    """
    chains = find_chains(graph)
    if not chains:
        return graph
    chosen: list[tuple[list[int], int]] = []
    best = arena_of(graph)
    budget = OVERHEAD_LIMIT * macs
    runs_cache: dict[tuple[tuple[int, ...], int], int] = {}

    def overhead(chain: list[int], band: int) -> int:
        key = (tuple(chain), band)
        if key not in runs_cache:
            run, _ = make_run(graph, chain, band, "")
            runs_cache[key] = estimated_overhead(run)
        return runs_cache[key]

    subs = [sub for chain in chains for sub in _subruns(chain)]
    while True:
        cands = []
        for sub in subs:
            # a candidate may replace the chosen runs it overlaps (a longer run, another band)
            kept = [(c, b) for c, b in chosen if not set(c) & set(sub)]
            spent = sum(overhead(c, b) for c, b in kept)
            for band in _bands(graph, sub):
                cost = overhead(sub, band)
                if spent + cost > budget or (sub, band) in chosen:
                    continue
                trial = kept + [(sub, band)]
                cands.append((bound_of(apply_runs(graph, trial)), spent + cost, trial))
        cands.sort(key=lambda c: (c[0], c[1]))
        for _, _, trial in cands[:PLANNER_TRIES]:
            arena = arena_of(apply_runs(graph, trial))
            if arena < best:
                best, chosen = arena, trial
                break
        else:
            break
    # the same arena with taller bands costs fewer calls
    for i in range(len(chosen)):
        sub, band = chosen[i]
        for taller in sorted(b for b in _bands(graph, sub) if b > band)[::-1]:
            trial = chosen[:i] + [(sub, taller)] + chosen[i + 1:]
            if arena_of(apply_runs(graph, trial)) <= best:
                chosen = trial
                break
    return apply_runs(graph, chosen) if chosen else graph


def _bands(graph: Graph, sub: list[int]) -> list[int]:
    height = graph.ops[sub[-1]].attrs["call"].params.out_h
    return [b for b in BAND_HEIGHTS if b < height]


def _linked(graph: Graph, sub: list[int]) -> bool:
    """Whether each op of sub reads the previous one's output (a chain with gaps removed
    by `taken` is no longer one)."""
    return all(graph.ops[b].attrs["call"].args[0] == graph.ops[a].attrs["call"].args[-1]
               for a, b in zip(sub, sub[1:], strict=False))


def stream_runs(graph: Graph) -> list[tuple[int, StreamRun]]:
    """(op index, run) of every stream op of graph."""
    return [(k, op.attrs["run"]) for k, op in enumerate(graph.ops) if op.kind == "stream"]
