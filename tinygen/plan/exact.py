"""Exact offset assignment by branch and bound, for problems small enough.

Any placement can be compacted (move a buffer to its lowest free offset while one can move)
without growing the arena; in a compacted placement, taking the buffers by increasing
offset, each sits at the lowest fitting offset given the ones before it. So searching the
orders in which buffers are placed lowest-fit finds an optimal arena, and only orders whose
offsets never decrease need to be tried. A branch is cut when its bound reaches the best
arena known: per step, the lowest offset still open plus the bytes above it that the step's
placed and unplaced buffers need. The search stops at the whole-tensor lower bound (proven
optimal), when it has tried every order (proven), or after `NODE_BUDGET` nodes (not proven;
the best arena found is kept). Counting nodes, not seconds, keeps the result the same on
every machine.
"""
from __future__ import annotations

from dataclasses import dataclass

NODE_BUDGET = 20000
MAX_BUFFERS = 40  # larger problems keep the best heuristic


@dataclass
class ExactResult:
    arena: int
    offsets: dict[str, int] | None  # None: no better placement than the one given
    proven: bool
    nodes: int
    note: str


def _align(x: int, a: int) -> int:
    return (x + a - 1) // a * a


def exact_placement(bufs, align: int, best_arena: int, bound: int) -> ExactResult:
    """Search for an arena below `best_arena` (a heuristic's); `bound` is the aligned
    whole-tensor lower bound."""
    n = len(bufs)
    if n > MAX_BUFFERS:
        return ExactResult(best_arena, None, False, 0,
                           f"exact search skipped: {n} buffers (> {MAX_BUFFERS})")
    size = [_align(max(b.size, 1), align) for b in bufs]
    first = [b.first for b in bufs]
    last = [b.last for b in bufs]
    together = [[j for j in range(n) if j != i and first[i] <= last[j] and first[j] <= last[i]]
                for i in range(n)]
    steps = sorted({first[i] for i in range(n)})  # live sets change only where one starts
    live_at = [[i for i in range(n) if first[i] <= s <= last[i]] for s in steps]
    # larger and longer-lived buffers first among equal offsets: good orders early
    pref = sorted(range(n), key=lambda i: (-size[i], -(last[i] - first[i]), bufs[i].name))
    offset = [-1] * n
    state = {"best": best_arena, "offsets": None, "nodes": 0}

    def lowest_fit(i: int, floor: int) -> int:
        spans = sorted((offset[j], offset[j] + size[j]) for j in together[i] if offset[j] >= 0)
        off = 0
        for lo, hi in spans:
            if off + size[i] <= lo:
                break
            off = max(off, hi)
        return off

    def node_bound(floor: int) -> int:
        worst = 0
        for live in live_at:
            need = 0
            for i in live:
                if offset[i] < 0:
                    need += size[i]
                elif offset[i] + size[i] > floor:
                    need += offset[i] + size[i] - max(offset[i], floor)
            worst = max(worst, floor + need)
        return worst

    def search(placed: int, floor: int, top: int) -> bool:
        """True when the search must stop (bound reached or budget spent)."""
        state["nodes"] += 1
        if placed == n:
            if top < state["best"]:
                state["best"], state["offsets"] = top, list(offset)
            return top <= bound
        if state["nodes"] >= NODE_BUDGET:
            return True
        if max(top, node_bound(floor)) >= state["best"]:
            return False
        for i in pref:
            if offset[i] >= 0:
                continue
            off = lowest_fit(i, floor)
            if off < floor:  # offsets never decrease along a compacted order
                continue
            offset[i] = off
            stop = search(placed + 1, off, max(top, off + size[i]))
            offset[i] = -1
            if stop:
                return True
        return False

    search(0, 0, 0)
    nodes = state["nodes"]
    found = state["offsets"]
    offsets = None if found is None else {bufs[i].name: found[i] for i in range(n)}
    arena = state["best"]
    if arena <= bound:
        return ExactResult(arena, offsets, True, nodes,
                           f"exact search: {arena} B equals the lower bound ({nodes} nodes)")
    if nodes >= NODE_BUDGET:
        return ExactResult(arena, offsets, False, nodes,
                           f"exact search stopped at its budget of {NODE_BUDGET} nodes: "
                           f"best {arena} B, not proven optimal (lower bound {bound} B)")
    return ExactResult(arena, offsets, True, nodes,
                       f"exact search finished ({nodes} nodes): {arena} B is optimal "
                       f"(lower bound {bound} B)")
