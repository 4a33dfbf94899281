"""Independent re-check of a memory plan (shares no code with the planners).

For every pair of arena buffers whose lifetimes overlap, their byte ranges must be disjoint;
every buffer must lie inside its region and start on the alignment.
"""
from __future__ import annotations


def verify_plan(plan) -> list[str]:
    """Return a list of violations (empty when the plan is sound)."""
    errors = []
    caps = {r.name: (r.capacity if r.capacity is not None else r.used) for r in plan.regions}
    bufs = [b for b in plan.buffers.values() if b.external is None]
    for b in bufs:
        if b.offset is None or b.region not in caps:
            errors.append(f"buffer {b.name} is not placed")
            continue
        if b.offset % plan.align:
            errors.append(f"buffer {b.name} at {b.offset} is not {plan.align}-aligned")
        if b.offset < 0 or b.offset + b.size > caps[b.region]:
            errors.append(f"buffer {b.name} [{b.offset}, {b.offset + b.size}) leaves region "
                          f"{b.region} ({caps[b.region]} B)")
    for i, a in enumerate(bufs):
        for b in bufs[i + 1:]:
            if a.region != b.region or a.offset is None or b.offset is None:
                continue
            live_together = a.first <= b.last and b.first <= a.last
            disjoint = a.offset + a.size <= b.offset or b.offset + b.size <= a.offset
            if live_together and not disjoint and a.size and b.size:
                errors.append(f"buffers {a.name} and {b.name} are live together at "
                              f"overlapping offsets")
    return errors
