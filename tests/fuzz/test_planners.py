"""Random planner inputs (buffers with sizes and lifetimes) through every planner.

Each plan must pass tinygen.plan.verify_plan and, separately, the brute-force byte check
below (one bytearray per step, sharing no code with planner or verifier). The verifier must
also catch plans broken on purpose, or passing plans would prove nothing.
"""
from __future__ import annotations

import copy

import pytest
from hypothesis import assume, given
from hypothesis import strategies as st

from tests.fuzz.budget import fuzz_settings
from tinygen.plan import PLANNERS, Buffer, plan_memory, verify_plan
from tinygen.plan.lifetimes import lower_bound


@st.composite
def buffers(draw, max_buffers: int = 24):
    """Buffers over `steps` ops: graph inputs start at -1, outputs live to `steps`."""
    steps = draw(st.integers(1, 30))
    n = draw(st.integers(1, max_buffers))
    out = {}
    for i in range(n):
        first = draw(st.integers(-1, steps))
        last = draw(st.integers(first, steps))
        size = draw(st.one_of(st.integers(0, 64), st.integers(1, 5000),
                              st.sampled_from([1, 7, 8, 9, 255, 256, 4096])))
        external = draw(st.sampled_from([None] * 6 + ["input:0", "output:0"]))
        out[f"b{i}"] = Buffer(f"b{i}", size, first, last, [f"t{i}"], external)
    return out, steps


def brute_force_problems(plan) -> list[str]:
    """Mark every byte each live buffer uses at every step; any byte used twice is a clash."""
    problems = []
    steps = [b for b in plan.buffers.values() if b.external is None]
    if not steps:
        return problems
    lo = min(b.first for b in steps)
    hi = max(b.last for b in steps)
    caps = {r.name: r.capacity if r.capacity is not None else r.used for r in plan.regions}
    for s in range(lo, hi + 1):
        used = {r: bytearray(caps[r] + 1) for r in caps}
        for b in steps:
            if not b.first <= s <= b.last:
                continue
            if b.offset is None or b.region not in caps or b.offset % plan.align:
                problems.append(f"{b.name} misplaced")
                continue
            if b.offset + b.size > caps[b.region]:
                problems.append(f"{b.name} out of region")
                continue
            mem = used[b.region]
            for i in range(b.offset, b.offset + b.size):
                if mem[i]:
                    problems.append(f"{b.name} clashes at step {s} byte {i}")
                    break
                mem[i] = 1
    return problems


@fuzz_settings(3.0)
@given(buffers(), st.sampled_from(PLANNERS), st.sampled_from([4, 8, 16, 64]))
def test_every_planner_makes_a_sound_plan(case, planner, align):
    bufs, steps = case
    plan = plan_memory(bufs, {b.tensors[0]: b.name for b in bufs.values()},
                       list(range(steps)), planner, align, None)
    assert verify_plan(plan) == []
    assert brute_force_problems(plan) == []
    bound = lower_bound(bufs, steps)
    assert plan.arena_bytes >= bound  # no placement beats the bytes live at one step
    if planner == "naive":
        assert plan.arena_bytes == sum(-(-max(b.size, 1) // align) * align
                                       for b in bufs.values() if b.external is None)


@fuzz_settings(1.0)
@given(buffers(max_buffers=12), st.sampled_from(PLANNERS),
       st.lists(st.integers(0, 6000), min_size=1, max_size=3))
def test_regions_hold_what_they_say(case, planner, capacities):
    bufs, steps = case
    regions = [(f"r{i}", cap) for i, cap in enumerate(capacities)]
    try:
        plan = plan_memory(bufs, {}, list(range(steps)), planner, 8, regions)
    except MemoryError:
        # refused: some buffer must be bigger than the largest region
        biggest = max((b.size for b in bufs.values() if b.external is None), default=0)
        assume(biggest > max(capacities))  # otherwise it may be a packing limit; skip
        return
    assert verify_plan(plan) == []
    assert brute_force_problems(plan) == []
    for r in plan.regions:
        assert r.used <= r.capacity


@fuzz_settings(1.0)
@given(buffers(), st.sampled_from(["greedy-size", "first-fit"]), st.data())
def test_verifier_catches_a_broken_plan(case, planner, data):
    bufs, steps = case
    plan = plan_memory(bufs, {}, list(range(steps)), planner, 8, None)
    live = [b for b in plan.buffers.values() if b.external is None and b.size > 0]
    pairs = [(a, b) for a in live for b in live if a is not b and a.overlaps(b)]
    assume(pairs)
    a, b = data.draw(st.sampled_from(pairs))
    broken = copy.deepcopy(plan)
    broken.buffers[a.name].offset = broken.buffers[b.name].offset  # two live, same bytes
    assert verify_plan(broken) != []
    assert brute_force_problems(broken) != []


@pytest.mark.parametrize("offset, align, problem", [(3, 8, "aligned"), (None, 8, "placed")])
def test_verifier_catches_misplaced_buffers(offset, align, problem):
    bufs = {"a": Buffer("a", 16, 0, 2, ["a"])}
    plan = plan_memory(bufs, {}, [0, 1, 2], "naive", align, None)
    plan.buffers["a"].offset = offset
    assert any(problem in p for p in verify_plan(plan))
