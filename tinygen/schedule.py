"""Execution order of the ops: the given (topological) one, or one that lowers peak memory.

The peak-minimising order is an exact dynamic programme over the sets of ops already run
(memoised on the frontier), which is small for chains and modest branching. Graphs of more
than `MAX_EXACT_OPS` ops, or whose search passes `MAX_STATES` states, get a greedy order
instead (the ready op that allocates least minus what it frees; ties: the lowest index),
kept in a heap so it costs O(E log n) for E op-buffer uses.
"""
from __future__ import annotations

import heapq

from tinygen.ir import Graph

MAX_STATES = 20000
MAX_EXACT_OPS = 200  # each DP state costs O(n); past this the greedy order is used


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
    if n > MAX_EXACT_OPS:
        return greedy_order(n, deps, defines, uses, users, size_of)
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
        return greedy_order(n, deps, defines, uses, users, size_of)


def greedy_order(n, deps, defines, uses, users, size_of) -> list[int]:
    """Repeatedly run the ready op with the smallest (bytes it defines - bytes of the
    buffers it is the last user of), ties to the lowest index. Scores change only when a
    buffer's users drop to one, so each ready op sits in a heap and is re-scored then."""
    remaining = {b: len(us) for b, us in users.items()}
    alloc = [sum(size_of(b) for b in defines[i] if b is not None) for i in range(n)]
    waiting = [len(d) for d in deps]
    dependents: list[list[int]] = [[] for _ in range(n)]
    for i, d in enumerate(deps):
        for j in d:
            dependents[j].append(i)

    def score(i: int) -> int:
        freed = sum(size_of(b) for b in uses[i] if b is not None and remaining[b] == 1)
        return alloc[i] - freed

    current: dict[int, int] = {}  # ready op -> its score in the heap
    heap: list[tuple[int, int]] = []

    def push(i: int) -> None:
        current[i] = score(i)
        heapq.heappush(heap, (current[i], i))

    for i in range(n):
        if not waiting[i]:
            push(i)
    order = []
    while heap:
        sc, i = heapq.heappop(heap)
        if current.get(i) != sc:
            continue  # stale entry
        del current[i]
        order.append(i)
        for b in uses[i]:
            if b is None:
                continue
            remaining[b] -= 1
            if remaining[b] == 1:  # its last user now frees it
                for j in users[b]:
                    if j in current:
                        push(j)
        for j in dependents[i]:
            waiting[j] -= 1
            if not waiting[j]:
                push(j)
    return order
