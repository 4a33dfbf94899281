"""Offset assignment: buffers with overlapping lifetimes get disjoint byte ranges.

  greedy-size  largest buffer first, each at the lowest aligned offset that fits between the
               already-placed buffers it overlaps in time (best known general heuristic;
               greedy-by-size offset assignment)
  first-fit    buffers in the order they are written, lowest fitting offset
  greedy-lifetime  longest lifetime first (then larger), lowest fitting offset
  greedy-area  largest size x lifetime first, lowest fitting offset
  naive        no reuse: every buffer its own range (what a planner-less build would use)
  auto         (default) every heuristic above but naive, in that order; the smallest arena
               wins, ties to the first. Unless the winner already equals the lower bound, an
               exact search follows (plan/exact.py) when the problem is small enough: it
               either proves the best arena optimal or stops at its node budget and keeps
               the best found. Deterministic: budgets count nodes, not seconds.
With several regions (--region NAME=SIZE), a buffer goes to the first region in which it
fits, regions tried in the order given.
"""
from __future__ import annotations

from dataclasses import dataclass, field

from tinygen.plan.lifetimes import Buffer


@dataclass
class Region:
    name: str
    capacity: int | None  # None: unbounded (sized by the plan)
    used: int = 0


@dataclass
class MemoryPlan:
    buffers: dict[str, Buffer]
    owner: dict[str, str]
    regions: list[Region]
    align: int
    planner: str
    order: list[int]
    lower_bound: int = 0
    naive: int = 0
    notes: list[str] = field(default_factory=list)
    winner: str = ""  # the strategy whose placement is kept (auto: the best one)
    optimal: bool = False  # proven: equals the aligned lower bound, or the search finished
    tried: dict[str, int] = field(default_factory=dict)  # auto: arena bytes per strategy

    @property
    def arena_bytes(self) -> int:
        return sum(r.used for r in self.regions)

    def offset_of(self, tensor: str) -> tuple[Buffer, int]:
        buf = self.buffers[self.owner[tensor]]
        return buf, buf.offset or 0


def _align(x: int, a: int) -> int:
    return (x + a - 1) // a * a


class _PlacedInTime:
    """The buffers placed in one region, found by time: those live at a step, and those
    first written at a step. Asking which placed buffers overlap [first, last] costs the
    lifetime's length plus the answer, not the number of buffers placed (the old all-pairs
    scan made a 100,000-op chain quadratic)."""

    def __init__(self) -> None:
        self.live_at: dict[int, list[Buffer]] = {}
        self.starting_at: dict[int, list[Buffer]] = {}

    def add(self, buf: Buffer) -> None:
        self.starting_at.setdefault(buf.first, []).append(buf)
        for s in range(buf.first, buf.last + 1):
            self.live_at.setdefault(s, []).append(buf)

    def overlapping(self, buf: Buffer) -> list[Buffer]:
        # live at buf.first, or first written later within buf's lifetime: each once
        found = list(self.live_at.get(buf.first, ()))
        starting = self.starting_at
        for s in range(buf.first + 1, buf.last + 1):
            found.extend(starting.get(s, ()))
        return found


def _lowest_fit(buf: Buffer, placed: _PlacedInTime, align: int, capacity: int | None):
    size = _align(max(buf.size, 1), align)
    spans = sorted((p.offset, p.offset + _align(max(p.size, 1), align))
                   for p in placed.overlapping(buf))
    off = 0
    for lo, hi in spans:
        if off + size <= lo:
            break
        off = max(off, _align(hi, align))
    if capacity is not None and off + size > capacity:
        return None
    return off


def _assign(bufs: list[Buffer], regions: list[Region], align: int, reuse: bool) -> None:
    placed = {r.name: _PlacedInTime() for r in regions}
    for buf in bufs:
        for r in regions:
            if reuse:
                off = _lowest_fit(buf, placed[r.name], align, r.capacity)
            else:
                off = r.used
                if r.capacity is not None and off + _align(buf.size, align) > r.capacity:
                    off = None
            if off is None:
                continue
            buf.offset, buf.region = off, r.name
            if reuse:
                placed[r.name].add(buf)
            r.used = max(r.used, off + _align(max(buf.size, 1), align))
            break
        else:
            total = sum(r.capacity or 0 for r in regions)
            raise MemoryError(f"buffer '{buf.name}' ({buf.size} B) fits in no region "
                              f"(regions total {total} B)")


HEURISTICS = ("greedy-size", "first-fit", "greedy-lifetime", "greedy-area")


def _sorted_for(planner: str, bufs: list[Buffer]) -> list[Buffer]:
    if planner == "greedy-size":
        return sorted(bufs, key=lambda b: (-b.size, b.first, b.name))
    if planner == "greedy-lifetime":
        return sorted(bufs, key=lambda b: (-(b.last - b.first), -b.size, b.first, b.name))
    if planner == "greedy-area":
        return sorted(bufs, key=lambda b: (-b.size * (b.last - b.first + 1), b.first, b.name))
    return sorted(bufs, key=lambda b: (b.first, b.name))


def aligned_lower_bound(bufs: list[Buffer], align: int) -> int:
    """Largest sum of aligned sizes live at one step: no placement can do better."""
    events: dict[int, int] = {}
    for b in bufs:
        size = _align(max(b.size, 1), align)
        events[b.first] = events.get(b.first, 0) + size
        events[b.last + 1] = events.get(b.last + 1, 0) - size
    best = live = 0
    for s in sorted(events):
        live += events[s]
        best = max(best, live)
    return best


def plan_memory(buffers: dict[str, Buffer], owner: dict[str, str], order: list[int],
                planner: str, align: int, regions: list[tuple[str, int]] | None
                ) -> MemoryPlan:
    """Place every arena buffer with `planner` (see the module text)."""
    if planner not in PLANNERS:
        raise ValueError(planner)
    arena_bufs = [b for b in buffers.values() if b.external is None]

    def new_regions():
        return [Region(n, c) for n, c in regions] if regions else [Region("arena", None)]

    if planner != "auto":
        regs = new_regions()
        _assign(_sorted_for(planner, arena_bufs), regs, align, reuse=planner != "naive")
        plan = MemoryPlan(buffers, owner, regs, align, planner, order, winner=planner)
        plan.optimal = not regions and plan.arena_bytes == aligned_lower_bound(arena_bufs,
                                                                                align)
        return plan
    best = None  # (arena, strategy, regions, placement)
    tried: dict[str, int] = {}
    failure = None
    for name in HEURISTICS:
        regs = new_regions()
        try:
            _assign(_sorted_for(name, arena_bufs), regs, align, reuse=True)
        except MemoryError as exc:
            failure = failure or exc
            continue
        arena = sum(r.used for r in regs)
        tried[name] = arena
        if best is None or arena < best[0]:
            best = (arena, name, regs, {b.name: (b.offset, b.region) for b in arena_bufs})
    if best is None:
        raise failure
    arena, name, regs, placement = best
    for b in arena_bufs:
        b.offset, b.region = placement[b.name]
    plan = MemoryPlan(buffers, owner, regs, align, "auto", order, winner=name, tried=tried)
    bound = aligned_lower_bound(arena_bufs, align)
    plan.optimal = not regions and arena == bound
    if regions:
        plan.notes.append("auto with --region: heuristics only (no exact search)")
    elif not plan.optimal:
        from tinygen.plan.exact import exact_placement
        result = exact_placement(arena_bufs, align, arena, bound)
        if result.offsets is not None and result.arena < arena:
            for b in arena_bufs:
                b.offset = result.offsets[b.name]
            regs[0].used = result.arena
            plan.winner = "exact"
            tried["exact"] = result.arena
        plan.optimal = result.proven
        plan.notes.append(result.note)
    return plan


PLANNERS = ("auto", *HEURISTICS, "naive")
