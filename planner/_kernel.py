"""Numba kernel of the anytime search: Anytime Weighted A* (Hansen & Zhou 2007) and ANA*.

Private module: arrays and scalars in, status codes out, never raises. ``planner.session``
validates requests, owns the workspaces and turns status codes into results.

Heuristic contract (shared with ``planner.heuristics``)
-------------------------------------------------------
The kernel computes, for a node ``v`` and the destination ``t``::

    h(v) = max((chord_m(v, t) - chord_margin_m) * (1 - 1e-9) / max_speed_mps,
               ALT(v, t) - lm_slack_s,
               0)
    ALT(v, t) = max over landmarks l of max(lm_to[v, l] - lm_to[t, l],
                                            lm_from[t, l] - lm_from[v, l])

``chord_m`` is the straight-line distance through the earth between the two points on a sphere
of radius 6 371 009 m (osmnx's radius); it never exceeds the great-circle distance (see
:func:`node_coords`), so this term is admissible wherever the great-circle bound is;
``chord_margin_m`` (about 1 cm for a 100 km region) covers the float32 storage of positions.

``lm_from : float32[n, L]`` holds d(landmark l -> v) and ``lm_to : float32[n, L]`` holds
d(v -> landmark l) in seconds of free-flow travel time, node-major (row = node, C order).
``L`` may be 0 (pass arrays of shape ``(n, 0)`` or ``(1, 0)``). ``+inf`` marks "unreachable";
``inf - inf`` gives NaN, which the max ignores, and ``inf - finite`` correctly proves that ``v``
cannot reach ``t`` (the node is then pruned). ``lm_slack_s >= 0`` is subtracted once from the
ALT term so that float32 rounding of the stored distances cannot make the bound inadmissible.

Workspace layout (one per concurrently running search, reused across queries)
-----------------------------------------------------------------------------
``nodei : int32[n, 4]`` columns ``N_STAMP, N_OPEN, N_PARENT, N_PEDGE`` and
``nodef : float64[n, 2]`` columns ``N_G, N_H``. A row is valid only where
``nodei[v, N_STAMP] == istate[I_GEN]``; a new query bumps the generation instead of clearing
O(n) memory. ``N_OPEN`` is 1 while the node is on the open list.

``heap : float64[2, cap, 2]`` holds two 4-ary min-heaps of ``(key, node)`` entries with lazy
deletion (``cap`` = n + max(n // 2, 64)): row 0 is ordered by the search key (``g + w*h``, or
the ANA* key), row 1 by ``f = g + h``. A node's improvement pushes a new entry instead of moving
the old one; entries of nodes that are no longer open are dropped when they reach the top, and
an entry of row 1 is current only while its f equals the node's ``g + h``. Because a newer entry
of a node always has a smaller key than its older ones, the first entry of a node to reach the
top is its current one. Between calls the top of each row is current, so ``min f`` over open is
``heap[1, 0, 0]`` -- except under weight 1, where row 0 is ordered by f already, row 1 is not
kept (``istate[I_FHEAP_ON] == 0``) and ``min f`` is ``heap[0, 0, 0]`` (:func:`open_min_f`).
When a row is full it is compacted to one entry per open node (O(entries)); the open list has
at most n - 1 nodes, so that always frees room. A weight, mode or (ANA*) incumbent change
re-keys row 0 the same way.

``istate : int64[I_LEN]`` and ``fstate : float64[F_LEN]`` carry everything else, so a chunk
call passes 11 arguments (numba's dispatch cost grows with the argument count).

Invariants kept by :func:`run_chunk`
------------------------------------
* Every open node had ``g + h < incumbent`` when it was opened; nodes whose ``f`` reached the
  incumbent later are discarded, unexpanded, when popped.
* ``istate[I_SIZE]`` is the number of open nodes; ``fstate[F_SUM_G]`` / ``fstate[F_SUM_H]``
  are the sums of g / h over them.
* The destination is never opened: reaching it with a better g makes it the incumbent, the
  current expansion is finished and the call returns ``IMPROVED`` so the caller can extract the
  route at once (parent pointers of a route never change while the kernel is not running).
* ``min(incumbent, min f over open)`` never exceeds the optimal cost (for an admissible h).
"""

from __future__ import annotations

import math

import numpy as np
from llvmlite import ir
from numba import njit
from numba.core import cgutils, types
from numba.extending import intrinsic

# ---- status codes returned by run_chunk ----
CHUNK_DONE = 0  #: the expansion limit of this call was reached
IMPROVED = 1  #: a cheaper route to the destination was found (new incumbent)
PROVEN = 2  #: open list empty or min f >= incumbent: incumbent optimal (or no route if none)

# ---- search modes ----
MODE_WEIGHTED = 0  #: key g + w*h (Anytime Weighted A*)
MODE_ANA = 1  #: ANA* key -(G - g)/h; greedy on h before the first route (ties arbitrary)

# ---- istate slots (int64) ----
I_GEN = 0  #: generation stamp of the current query (>= 1)
I_ORIGIN = 1
I_TARGET = 2
I_SIZE = 3  #: number of open nodes
I_MODE = 4  #: MODE_WEIGHTED or MODE_ANA (caller may change it between calls)
I_CHUNK = 5  #: expansion limit for the next call (input)
I_EXPANSIONS = 6  #: total expansions of this query
I_IMPROVEMENTS = 7
I_KEYED_MODE = 8  #: mode the heap keys were computed with
I_PUSHES = 9
I_REOPENED = 10  #: pushes of a node that had been expanded or opened before
I_PRUNED = 11  #: successors skipped or open entries discarded because g + h >= incumbent
I_TOUCHED = 12  #: nodes stamped in this query (search footprint)
I_FHEAP_ON = 13  #: 1 when heap row 1 (ordered by f) is maintained, 0 when row 0 already is
I_HEAP0 = 14  #: entries in heap row 0 (>= open nodes: lazy deletion)
I_HEAP1 = 15  #: entries in heap row 1
I_COMPACTIONS = 16  #: full heap rows compacted
I_REKEYS = 17  #: open-list re-keys after a weight, mode or (ANA*) incumbent change
I_LEN = 20

# ---- fstate slots (float64) ----
F_WEIGHT = 0  #: weight w of the key g + w*h (input)
F_INCUMBENT = 1  #: cost of the best route found, +inf before (caller may lower it)
F_KEYED_WEIGHT = 2  #: weight / incumbent the heap keys were computed with
F_KEYED_INCUMBENT = 3
F_SUM_G = 4  #: sum of g over open
F_SUM_H = 5  #: sum of h over open
F_GC_SCALE = 6  #: (1 - 1e-9) / max_speed_mps: metres -> admissible seconds
F_LM_SLACK = 7  #: lm_slack_s
F_T_X = 8  #: destination position on the earth sphere (metres, see node_coords)
F_T_Y = 9
F_T_Z = 10
F_H_START = 11  #: h(origin)
F_GC_MARGIN = 12  #: chord_margin_m of the coords array (see node_coords)
F_LEN = 16

# ---- workspace columns ----
N_STAMP = 0
N_OPEN = 1
N_PARENT = 2
N_PEDGE = 3
N_ICOLS = 4
N_G = 0
N_H = 1
N_FCOLS = 2

#: Mean earth radius in metres (the value of planner.graph.EARTH_RADIUS_M, osmnx's).
_EARTH_RADIUS_M = 6_371_009.0
_INF = np.inf
#: Heap arity: a 4-ary heap is half as deep as a binary one and its children share cache lines
#: (``_sift_down`` unrolls the comparison of 4 children).
_D = 4


@intrinsic
def _prefetch_row(typingctx, arr, row):
    """Ask the CPU to start loading the cache line holding ``arr[row, 0, ...]``.

    A hint only (LLVM ``llvm.prefetch``, read, high locality): it never faults, even for an
    index past the end, and never changes a result. A search touches each node's rows in three
    arrays (``nodei``, ``nodef``, ``coords``) spread over megabytes, so most of its time is
    spent waiting for memory; issuing the loads for all successors (and for the next node to
    expand) before using any of them lets those cache misses overlap.
    """

    def codegen(context, builder, signature, args):
        aryty, rowty = signature.args
        ary = context.make_array(aryty)(context, builder, args[0])
        zero = context.get_constant(types.intp, 0)
        idx = context.cast(builder, args[1], rowty, types.intp)
        ptr = cgutils.get_item_pointer(
            context, builder, aryty, ary, [idx] + [zero] * (aryty.ndim - 1), wraparound=False
        )
        i8p = ir.IntType(8).as_pointer()
        i32 = ir.IntType(32)
        fnty = ir.FunctionType(ir.VoidType(), [i8p, i32, i32, i32])
        fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.prefetch.p0")
        # (address, rw = 0 read, locality = 3 keep in all cache levels, cache type = 1 data)
        builder.call(fn, [builder.bitcast(ptr, i8p), i32(0), i32(3), i32(1)])
        return context.get_dummy_value()

    return types.void(arr, row), codegen


@njit(cache=True, nogil=True, inline="always")
def _heuristic(v, t, coords, lm_from, lm_to, tx, ty, tz, margin_m, scale, slack):
    """Admissible estimate h(v) in seconds (see the module docstring).

    ``tx, ty, tz`` = coords of t (float64), ``margin_m`` = float32 rounding allowance,
    ``scale`` = (1 - 1e-9) / max_speed_mps, ``slack`` = lm_slack_s. Passed as scalars so the
    compiler keeps them in registers.
    """
    dx = np.float64(coords[v, 0]) - tx
    dy = np.float64(coords[v, 1]) - ty
    dz = np.float64(coords[v, 2]) - tz
    h = (math.sqrt(dx * dx + dy * dy + dz * dz) - margin_m) * scale
    n_lm = lm_from.shape[1]
    if n_lm > 0:
        best = -_INF
        for k in range(n_lm):
            d1 = np.float64(lm_to[v, k]) - np.float64(lm_to[t, k])
            d2 = np.float64(lm_from[t, k]) - np.float64(lm_from[v, k])
            if d1 > best:  # NaN (inf - inf) compares false and is ignored
                best = d1
            if d2 > best:
                best = d2
        best -= slack
        if best > h:
            h = best
    if h < 0.0:
        h = 0.0
    return h


@njit(cache=True, nogil=True, inline="always")
def _key(mode, g, h, w, incumbent):
    """Search key of an open node: g + w*h, or the ANA* key (smaller is expanded first)."""
    if mode == MODE_WEIGHTED:
        return g + w * h
    if incumbent == _INF:
        return h  # greedy before the first route
    if h <= 0.0:
        return -_INF
    return -(incumbent - g) / h


@njit(cache=True, nogil=True, inline="always")
def _sift_down(heap, row, i, key, node, size):
    """Place entry (key, node) at slot i or below in a heap of ``size`` entries."""
    while True:
        c = _D * i + 1
        if c + _D <= size:  # all children present: fixed-length, branch-light comparison
            best = c
            bk = heap[row, c, 0]
            k1 = heap[row, c + 1, 0]
            if k1 < bk:
                best = c + 1
                bk = k1
            k2 = heap[row, c + 2, 0]
            if k2 < bk:
                best = c + 2
                bk = k2
            k3 = heap[row, c + 3, 0]
            if k3 < bk:
                best = c + 3
                bk = k3
        elif c < size:
            best = c
            bk = heap[row, c, 0]
            for j in range(c + 1, size):
                jk = heap[row, j, 0]
                if jk < bk:
                    best = j
                    bk = jk
        else:
            break
        if key <= bk:
            break
        heap[row, i, 0] = bk
        heap[row, i, 1] = heap[row, best, 1]
        i = best
    heap[row, i, 0] = key
    heap[row, i, 1] = node


@njit(cache=True, nogil=True, inline="always")
def _push(heap, row, size, key, node):
    """Add an entry to a heap of ``size`` entries (the caller increments the size)."""
    i = size
    while i > 0:
        p = (i - 1) // _D
        pk = heap[row, p, 0]
        if pk <= key:
            break
        heap[row, i, 0] = pk
        heap[row, i, 1] = heap[row, p, 1]
        i = p
    heap[row, i, 0] = key
    heap[row, i, 1] = node


@njit(cache=True, nogil=True, inline="always")
def _pop(heap, row, size):
    """Remove the top entry of a heap of ``size`` > 0 entries (the caller decrements)."""
    last = size - 1
    if last > 0:
        _sift_down(heap, row, 0, heap[row, last, 0], heap[row, last, 1], last)


@njit(cache=True, nogil=True)
def _rebuild(heap, src, dst, n_src, nodei, nodef, mode, w, inc):
    """Write one freshly keyed entry per open node found in row ``src`` into row ``dst``
    (``src == dst`` compacts in place) and heapify it; returns the new entry count."""
    k = 0
    for i in range(n_src):
        v = np.int64(heap[src, i, 1])
        if nodei[v, N_OPEN] == 1:
            nodei[v, N_OPEN] = 2  # taken: later duplicates of v are skipped
            g = nodef[v, N_G]
            h = nodef[v, N_H]
            heap[dst, k, 0] = _key(mode, g, h, w, inc) if dst == 0 else g + h
            heap[dst, k, 1] = v
            k += 1
    for i in range(k):
        nodei[np.int64(heap[dst, i, 1]), N_OPEN] = 1
    for i in range((k - 2) // _D, -1, -1):
        _sift_down(heap, dst, i, heap[dst, i, 0], heap[dst, i, 1], k)
    return k


@njit(cache=True, nogil=True)
def start_query(coords, lm_from, lm_to, nodei, nodef, heap, istate, fstate):
    """Open a query: stamp origin and destination, open the origin. O(1) in the graph size.

    The caller has set ``I_GEN`` (a fresh generation), ``I_ORIGIN``, ``I_TARGET``, ``I_MODE``,
    ``F_WEIGHT``, ``F_GC_SCALE``, ``F_LM_SLACK`` and zeroed the other slots.
    Returns h(origin).
    """
    gen = istate[I_GEN]
    s = istate[I_ORIGIN]
    t = istate[I_TARGET]
    fstate[F_T_X] = np.float64(coords[t, 0])
    fstate[F_T_Y] = np.float64(coords[t, 1])
    fstate[F_T_Z] = np.float64(coords[t, 2])
    fstate[F_INCUMBENT] = _INF
    nodei[t, N_STAMP] = gen
    nodei[t, N_OPEN] = 0
    nodei[t, N_PARENT] = -1
    nodei[t, N_PEDGE] = -1
    nodef[t, N_G] = _INF
    nodef[t, N_H] = 0.0
    hs = _heuristic(
        s,
        t,
        coords,
        lm_from,
        lm_to,
        fstate[F_T_X],
        fstate[F_T_Y],
        fstate[F_T_Z],
        fstate[F_GC_MARGIN],
        fstate[F_GC_SCALE],
        fstate[F_LM_SLACK],
    )
    nodei[s, N_STAMP] = gen
    nodei[s, N_OPEN] = 0
    nodei[s, N_PARENT] = -1
    nodei[s, N_PEDGE] = -1
    nodef[s, N_G] = 0.0
    nodef[s, N_H] = hs
    fstate[F_H_START] = hs
    istate[I_SIZE] = 0
    istate[I_HEAP0] = 0
    istate[I_HEAP1] = 0
    istate[I_TOUCHED] = 2
    fstate[F_SUM_G] = 0.0
    fstate[F_SUM_H] = 0.0
    mode = istate[I_MODE]
    w = fstate[F_WEIGHT]
    istate[I_KEYED_MODE] = mode
    fstate[F_KEYED_WEIGHT] = w
    fstate[F_KEYED_INCUMBENT] = _INF
    fon = 0 if (mode == MODE_WEIGHTED and w == 1.0) else 1
    istate[I_FHEAP_ON] = fon
    if hs < _INF:  # h = inf: the landmarks prove the destination unreachable
        nodei[s, N_OPEN] = 1
        heap[0, 0, 0] = _key(mode, 0.0, hs, w, _INF)
        heap[0, 0, 1] = s
        istate[I_HEAP0] = 1
        if fon:
            heap[1, 0, 0] = hs
            heap[1, 0, 1] = s
            istate[I_HEAP1] = 1
        istate[I_SIZE] = 1
        istate[I_PUSHES] = 1
        fstate[F_SUM_H] = hs
    return hs


@njit(cache=True, nogil=True)
def run_chunk(indptr, head, cost, coords, lm_from, lm_to, nodei, nodef, heap, istate, fstate):
    """Expand at most ``istate[I_CHUNK]`` nodes; return CHUNK_DONE, IMPROVED or PROVEN.

    Parameters
    ----------
    indptr : int64[n + 1]; head : int32[m]; cost : float64[m]
        CSR road graph, ``cost`` = travel_time_s (>= 0).
    coords : float32[n, 3]
        Node positions in metres (:func:`node_coords`).
    lm_from, lm_to : float32[n, L]
        Landmark distances (see the module docstring); L may be 0.
    nodei, nodef, heap, istate, fstate
        The workspace (see the module docstring).
    """
    gen = istate[I_GEN]
    t = istate[I_TARGET]
    mode = istate[I_MODE]
    w = fstate[F_WEIGHT]
    inc = fstate[F_INCUMBENT]
    cap = heap.shape[1]
    n_open = istate[I_SIZE]
    h0 = istate[I_HEAP0]
    h1 = istate[I_HEAP1]
    compactions = 0

    # Re-key the open list when the ordering changed (weight, mode, or G under ANA*): O(open).
    # Under weight 1 the search key is f itself, so row 1 is dropped and row 0 read instead;
    # row 1 is rebuilt from the open list when the weight leaves 1.
    if (
        mode != istate[I_KEYED_MODE]
        or w != fstate[F_KEYED_WEIGHT]
        or (mode == MODE_ANA and inc != fstate[F_KEYED_INCUMBENT])
    ):
        h0 = _rebuild(heap, 0, 0, h0, nodei, nodef, mode, w, inc)
        istate[I_REKEYS] += 1
        fon_now = 0 if (mode == MODE_WEIGHTED and w == 1.0) else 1
        if fon_now and not istate[I_FHEAP_ON]:
            h1 = _rebuild(heap, 0, 1, h0, nodei, nodef, mode, w, inc)
        if not fon_now:
            h1 = 0
        istate[I_FHEAP_ON] = fon_now
        istate[I_KEYED_MODE] = mode
        fstate[F_KEYED_WEIGHT] = w
        fstate[F_KEYED_INCUMBENT] = inc
    fon = istate[I_FHEAP_ON]
    frow = 1 if fon else 0

    tx = fstate[F_T_X]
    ty = fstate[F_T_Y]
    tz = fstate[F_T_Z]
    margin = fstate[F_GC_MARGIN]
    scale = fstate[F_GC_SCALE]
    slack = fstate[F_LM_SLACK]
    limit = istate[I_CHUNK]
    done = 0
    sum_g = fstate[F_SUM_G]
    sum_h = fstate[F_SUM_H]
    pushes = 0
    reopened = 0
    pruned = 0
    touched = 0
    status = CHUNK_DONE
    while True:
        # drop entries of closed nodes (and, in row 1, outdated f values) from the tops
        while h0 > 0 and nodei[np.int64(heap[0, 0, 1]), N_OPEN] == 0:
            _pop(heap, 0, h0)
            h0 -= 1
        if fon:
            while h1 > 0:
                v = np.int64(heap[1, 0, 1])
                if nodei[v, N_OPEN] != 0 and heap[1, 0, 0] == nodef[v, N_G] + nodef[v, N_H]:
                    break
                _pop(heap, 1, h1)
                h1 -= 1
        if status != CHUNK_DONE:
            break
        if n_open == 0 or heap[frow, 0, 0] >= inc:
            status = PROVEN
            break
        if done >= limit:
            break
        u = np.int64(heap[0, 0, 1])
        _pop(heap, 0, h0)
        h0 -= 1
        if h0 > 0:  # the new top is usually the next node expanded: start loading its rows
            nxt = np.int64(heap[0, 0, 1])
            _prefetch_row(nodei, nxt)
            _prefetch_row(nodef, nxt)
            e_nxt = indptr[nxt]
            _prefetch_row(head, e_nxt)
            _prefetch_row(cost, e_nxt)
        nodei[u, N_OPEN] = 0
        n_open -= 1
        gu = nodef[u, N_G]
        hu = nodef[u, N_H]
        sum_g -= gu
        sum_h -= hu
        if n_open == 0:  # cancel drift of the running sums
            sum_g = 0.0
            sum_h = 0.0
        if gu + hu >= inc:
            pruned += 1
            continue
        done += 1
        e_lo = indptr[u]
        e_hi = indptr[u + 1]
        for e in range(e_lo, e_hi):  # issue every successor's loads before using any of them
            v = np.int64(head[e])
            _prefetch_row(nodei, v)
            _prefetch_row(nodef, v)
            _prefetch_row(coords, v)
        for e in range(e_lo, e_hi):
            v = np.int64(head[e])
            nv = gu + cost[e]
            if nodei[v, N_STAMP] != gen:
                nodei[v, N_STAMP] = gen
                nodei[v, N_OPEN] = 0
                nodef[v, N_G] = _INF
                nodef[v, N_H] = _heuristic(
                    v, t, coords, lm_from, lm_to, tx, ty, tz, margin, scale, slack
                )
                touched += 1
            old = nodef[v, N_G]
            if nv >= old:
                continue
            if v == t:
                if nv < inc:
                    inc = nv
                    nodef[v, N_G] = nv
                    nodei[v, N_PARENT] = u
                    nodei[v, N_PEDGE] = e
                    status = IMPROVED
                continue
            hv = nodef[v, N_H]
            if nv + hv >= inc:
                pruned += 1
                continue
            nodef[v, N_G] = nv
            nodei[v, N_PARENT] = u
            nodei[v, N_PEDGE] = e
            if nodei[v, N_OPEN]:
                sum_g += nv - old
            else:
                if old < _INF:
                    reopened += 1
                nodei[v, N_OPEN] = 1
                n_open += 1
                sum_g += nv
                sum_h += hv
            pushes += 1
            if h0 == cap:
                h0 = _rebuild(heap, 0, 0, h0, nodei, nodef, mode, w, inc)
                compactions += 1
            _push(heap, 0, h0, _key(mode, nv, hv, w, inc), v)
            h0 += 1
            if fon:
                if h1 == cap:
                    h1 = _rebuild(heap, 1, 1, h1, nodei, nodef, mode, w, inc)
                    compactions += 1
                _push(heap, 1, h1, nv + hv, v)
                h1 += 1
        if status == IMPROVED:
            istate[I_IMPROVEMENTS] += 1
            # loop once more to leave clean tops, then break

    istate[I_SIZE] = n_open
    istate[I_HEAP0] = h0
    istate[I_HEAP1] = h1
    istate[I_EXPANSIONS] += done
    istate[I_PUSHES] += pushes
    istate[I_REOPENED] += reopened
    istate[I_PRUNED] += pruned
    istate[I_TOUCHED] += touched
    istate[I_COMPACTIONS] += compactions
    fstate[F_SUM_G] = sum_g
    fstate[F_SUM_H] = sum_h
    fstate[F_INCUMBENT] = inc
    return status


def open_min_f(heap: np.ndarray, istate: np.ndarray) -> float:
    """min over open of g + h (``inf`` when the open list is empty); Python-side helper."""
    if istate[I_SIZE] <= 0:
        return math.inf
    return float(heap[1 if istate[I_FHEAP_ON] else 0, 0, 0])


@njit(cache=True, nogil=True)
def extract_route(nodei, origin, target, max_len):
    """Walk parent pointers from ``target`` back to ``origin``.

    Returns ``(nodes int64[k + 1], edges int64[k])`` in travel order, or empty arrays when the
    walk does not reach the origin within ``max_len`` edges (cannot happen for a valid search).
    """
    k = 0
    v = target
    while v != origin and k < max_len:
        v = nodei[v, N_PARENT]
        if v < 0:
            return np.empty(0, np.int64), np.empty(0, np.int64)
        k += 1
    if v != origin:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    nodes = np.empty(k + 1, np.int64)
    edges = np.empty(k, np.int64)
    v = target
    for i in range(k, 0, -1):
        nodes[i] = v
        edges[i - 1] = nodei[v, N_PEDGE]
        v = nodei[v, N_PARENT]
    nodes[0] = origin
    return nodes, edges


def new_workspace(n_nodes: int) -> tuple[np.ndarray, ...]:
    """Allocate ``(nodei, nodef, heap, istate, fstate)`` for a graph of ``n_nodes``.

    Stamps start at 0 and generations at 1, so no row is valid until a query stamps it.
    """
    n = max(int(n_nodes), 1)
    nodei = np.zeros((n, N_ICOLS), dtype=np.int32)
    nodef = np.zeros((n, N_FCOLS), dtype=np.float64)
    heap = np.zeros((2, n + max(n // 2, 64), 2), dtype=np.float64)
    istate = np.zeros(I_LEN, dtype=np.int64)
    fstate = np.zeros(F_LEN, dtype=np.float64)
    return nodei, nodef, heap, istate, fstate


def node_coords(lat_deg: np.ndarray, lon_deg: np.ndarray) -> tuple[np.ndarray, float]:
    """Node positions for the chord bound: ``(coords float32[n, 3], chord_margin_m)``.

    Positions are points on the earth sphere (radius 6 371 009 m) in metres, shifted so that
    their mean is the origin (a chord does not depend on the origin) and stored in float32 to
    halve the memory a search touches. The straight-line (chord) distance between two points
    never exceeds their great-circle distance, and edge lengths are great-circle lengths along
    the road, so ``chord / max_speed`` is an admissible and consistent bound needing one square
    root instead of the haversine's four trigonometric calls; the two differ by d^2 / (24 R^2)
    relative (1e-7 at 10 km).

    Rounding each coordinate to float32 moves it by at most ``A * 2^-24`` (``A`` = the largest
    absolute shifted coordinate), so a chord computed from stored values is off by at most
    ``2 * sqrt(3) * A * 2^-24``; ``chord_margin_m = 4 * A * 2^-24`` is subtracted from every
    chord to keep the bound admissible (about 1 cm for a 100 km wide region). Consistency then
    holds up to 2 * margin, which the kernel's reopening absorbs.
    """
    lat = np.radians(np.asarray(lat_deg, dtype=np.float64))
    lon = np.radians(np.asarray(lon_deg, dtype=np.float64))
    c = np.cos(lat)
    xyz = np.column_stack((c * np.cos(lon), c * np.sin(lon), np.sin(lat))) * _EARTH_RADIUS_M
    if xyz.shape[0]:
        xyz -= xyz.mean(axis=0)
    biggest = float(np.max(np.abs(xyz))) if xyz.size else 0.0
    margin_m = 4.0 * biggest * 2.0**-24
    return np.ascontiguousarray(xyz, dtype=np.float32), margin_m


@njit(cache=True, nogil=True)
def dag_reachable(dindptr, dhead, src, dst):
    """Whether component ``dst`` is reachable from ``src`` in the condensation DAG (CSR).

    Breadth-first over components only: O(components reached), never O(graph nodes).
    """
    if src == dst:
        return True
    n = dindptr.shape[0] - 1
    seen = np.zeros(n, np.bool_)
    queue = np.empty(n, np.int64)
    queue[0] = src
    seen[src] = True
    lo = 0
    hi = 1
    while lo < hi:
        c = queue[lo]
        lo += 1
        for e in range(dindptr[c], dindptr[c + 1]):
            d = dhead[e]
            if d == dst:
                return True
            if not seen[d]:
                seen[d] = True
                queue[hi] = d
                hi += 1
    return False
