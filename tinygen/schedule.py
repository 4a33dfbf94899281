"""Execution order of the ops: the given (topological) one, or one that lowers peak memory.

The peak-minimising order is an exact dynamic programme over the sets of ops already run
(memoised on the frontier), which is small for chains and modest branching; past
`MAX_STATES` states it falls back to a greedy choice (the ready op that frees the most and
allocates the least).
"""
from __future__ import annotations

from tinygen.ir import Graph

MAX_STATES = 20000


def _deps(graph: Graph):
    prod = {o: i for i, op in enumerate(graph.ops) for o in op.outputs}
    deps = [{prod[t] for t in op.inputs if t in prod} for op in graph.ops]
    return deps


def order_ops(graph: Graph, how: str, buffer_of, size_of) -> list[int]:
    """Indices of graph.ops in execution order ('given' or 'min-peak')."""
    n = len(graph.ops)
    if how == "given" or n <= 1:
        return list(range(n))
    if how != "min-peak":
        raise ValueError(how)
    deps = _deps(graph)
    # buffers each op defines and uses; a buffer dies after its last user runs
    defines = [{buffer_of(t) for t in op.outputs} for op in graph.ops]
    uses = [{buffer_of(t) for t in op.inputs if buffer_of(t) is not None} for op in graph.ops]
    users: dict = {}
    for i, u in enumerate(uses):
        for bname in u:
            users.setdefault(bname, set()).add(i)
    pinned = {buffer_of(io.name) for io in graph.outputs}
    inputs_live = {buffer_of(io.name) for io in graph.inputs}

    def live_after(done: frozenset) -> set:
        live = set()
        for bname in inputs_live | set().union(*(defines[i] for i in done)) if done else \
                inputs_live:
            if bname is None:
                continue
            if bname in pinned or not users.get(bname, set()) <= done:
                live.add(bname)
        return live

    def mem(bufs) -> int:
        return sum(size_of(b) for b in bufs if b is not None)

    memo: dict[frozenset, tuple[int, list[int]]] = {}
    budget = [MAX_STATES]

    def best(done: frozenset) -> tuple[int, list[int]]:
        if len(done) == n:
            return 0, []
        if done in memo:
            return memo[done]
        budget[0] -= 1
        if budget[0] < 0:
            raise OverflowError
        live = live_after(done)
        result = (1 << 62, [])
        for i in range(n):
            if i in done or not deps[i] <= done:
                continue
            step_peak = mem(live | defines[i])
            rest_peak, rest = best(done | {i})
            cand = max(step_peak, rest_peak)
            if cand < result[0]:
                result = (cand, [i, *rest])
        memo[done] = result
        return result

    try:
        return best(frozenset())[1]
    except (OverflowError, RecursionError):
        return _greedy(n, deps, defines, uses, users, size_of)


def _greedy(n, deps, defines, uses, users, size_of) -> list[int]:
    done: set[int] = set()
    order = []
    while len(order) < n:
        ready = [i for i in range(n) if i not in done and deps[i] <= done]

        def score(i):
            freed = sum(size_of(b) for b in uses[i]
                        if b is not None and users.get(b, set()) <= done | {i})
            return sum(size_of(b) for b in defines[i] if b is not None) - freed

        i = min(ready, key=score)
        done.add(i)
        order.append(i)
    return order
