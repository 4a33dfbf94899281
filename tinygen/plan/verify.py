"""Independent re-check of a memory plan (shares no code with the planners).

Two arena buffers whose lifetimes overlap must have disjoint byte ranges; every buffer must
lie inside its region and start on the alignment.

The pair check is a sweep over the steps: buffers enter in the order they are first
written and leave after their last step; the ones live at the moment are kept sorted by
offset. While a region's live buffers are disjoint, a newcomer can only collide with its
neighbours in offset order (O(log n) per buffer with bisect); once a collision has been
found in a region, every later newcomer there (and the first colliding one) is compared
with all live buffers of that region, so each colliding pair is reported: the same pairs as
an all-pairs comparison, in sweep order. Sound plans cost O(n log n).
"""
from __future__ import annotations

import bisect
import heapq


def verify_plan(plan) -> list[str]:
    """Return a list of violations (empty when the plan is sound)."""
    errors = []
    caps = {r.name: (r.capacity if r.capacity is not None else r.used) for r in plan.regions}
    bufs = [b for b in plan.buffers.values() if b.external is None]
    placed = []
    for b in bufs:
        if b.offset is None or b.region not in caps:
            errors.append(f"buffer {b.name} is not placed")
            continue
        placed.append(b)
        if b.offset % plan.align:
            errors.append(f"buffer {b.name} at {b.offset} is not {plan.align}-aligned")
        if b.offset < 0 or b.offset + b.size > caps[b.region]:
            errors.append(f"buffer {b.name} [{b.offset}, {b.offset + b.size}) leaves region "
                          f"{b.region} ({caps[b.region]} B)")
    return errors + _collisions([b for b in placed if b.size])


def _collisions(bufs) -> list[str]:
    errors = []
    # live buffers per region: offsets sorted, and (offset, end, seq) in the same order
    starts: dict[str, list[int]] = {}
    spans: dict[str, list[tuple[int, int, int]]] = {}
    broken: set[str] = set()
    leaving: list[tuple[int, int]] = []  # (last step, seq) of live buffers
    order = sorted(range(len(bufs)), key=lambda i: (bufs[i].first, i))
    for seq in order:
        b = bufs[seq]
        while leaving and leaving[0][0] < b.first:  # dead before b is written
            _, gone = heapq.heappop(leaving)
            g = bufs[gone]
            span = (g.offset, g.offset + g.size, gone)
            at = bisect.bisect_left(spans[g.region], span)
            del spans[g.region][at], starts[g.region][at]
        st = starts.setdefault(b.region, [])
        sp = spans.setdefault(b.region, [])
        lo, hi = b.offset, b.offset + b.size
        if b.region in broken:
            hits = [j for (o, e, j) in sp if o < hi and lo < e]
        else:
            at = bisect.bisect_left(st, lo)
            hits = [j for (o, e, j) in sp[max(at - 1, 0):at + 1] if o < hi and lo < e]
            if hits:  # a wide newcomer may cover more than its neighbours
                hits = [j for (o, e, j) in sp if o < hi and lo < e]
        for j in sorted(hits):
            errors.append(f"buffers {bufs[j].name} and {b.name} are live together at "
                          f"overlapping offsets")
        if hits:
            broken.add(b.region)
        span = (lo, hi, seq)
        at = bisect.bisect_left(sp, span)
        sp.insert(at, span)
        st.insert(at, lo)
        heapq.heappush(leaving, (b.last, seq))
    return errors
