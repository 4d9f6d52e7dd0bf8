"""Numba kernel of the anytime search: Anytime Weighted A* (Hansen & Zhou 2007) and ANA*.

Private module: arrays and scalars in, status codes out, never raises. ``planner.session``
validates requests, owns the workspaces and turns status codes into results.

One call of :func:`run` expands nodes until one of its limits (an expansion count, a wall-clock
instant read from the monotonic clock inside the kernel, the stop flag another thread may set)
or an event (the optimum proven, the gap target reached, optionally a new incumbent). So a
search under a deadline needs one call per decision step, not one per chunk: Python touches the
search only between steps.

Heuristic contract (shared with ``planner.heuristics``)
-------------------------------------------------------
For a node ``v`` and the search's target ``T`` (a node, or a point on an edge)::

    h(v) = max((chord_m(v, T) - chord_margin_m) * (1 - 1e-9) / max_speed_mps,
               ALT(v, T) - lm_slack_s,
               0)
    ALT(v, T) = unit_s * max over the active landmarks l of max(lm[v, l, TO] - tlm[l, TO],
                                                               tlm[l, FROM] - lm[v, l, FROM])

``lm : uint16[n, L, 2]`` holds ``lm[v, l, TO] ~ d(v -> l)`` and ``lm[v, l, FROM] ~ d(l -> v)``
in units of ``unit_s = F_LM_UNIT`` seconds (``planner.heuristics``: 16-bit codes, ``BIG =
65535`` for "no path", finite distances at most 65534 units), node-major so that one node's row
is one 4L-byte block (one cache line for 16 landmarks). ``tlm`` is the target's row as integer
codes in ``istate`` (``I_TLM``), written per query; for a point on an edge it is derived from the
edge's end nodes and rounded the safe way (``TO`` up, ``FROM`` down), see ``planner.session``.
The whole term is integer arithmetic (it vectorises), scaled once.

Reading "no path" as the finite code ``BIG`` keeps every term admissible: ``BIG - tlm[TO]`` > 0
only when v cannot reach l but T can, so v cannot reach T (any bound is valid); ``tlm[FROM] -
BIG`` <= 0 says nothing; a target that l cannot reach gets ``tlm[FROM] = BIG``, so a node l does
reach gets a small positive term (l reaches v but not T: v cannot reach T) and one it does not
gets 0; ``tlm[TO] = BIG`` (T cannot reach l) makes every ``TO`` term <= 0. The *active* landmarks are the few (``I_N_ACTIVE``) chosen per query as the best
for its origin and target (Goldberg & Harrelson 2005): a max over fewer landmarks is still a
valid bound. ``lm_slack_s >= 0`` covers the float32 storage (and, under live costs that go
below the landmarks' basis, the total saving; see ``planner.heuristics``). ``chord_m`` is the
straight line through the earth (never above the great-circle distance; :func:`node_coords`);
a query may turn it off (``F_GC_SCALE = 0``: with 16 landmarks it almost never beats ALT, and
skipping it saves a cache line per node).

Workspace (one per concurrently running search, reused across queries)
---------------------------------------------------------------------
``state : float64[n, 4]``, one 32-byte record per node, read through two views:
``state[v, S_G]`` = g and ``state[v, S_H]`` = h (float64); ``si = state.view(int32)`` gives
``si[v, SI_STAMP]`` (generation), ``si[v, SI_FLAGS]``, ``si[v, SI_PARENT]`` (-1 for a source)
and ``si[v, SI_PEDGE]``. A record is valid only where ``si[v, SI_STAMP] == istate[I_GEN]``; a
new query bumps the generation instead of clearing O(n) memory. ``SI_FLAGS`` holds the open
state in its low 4 bits (0 not open, 1 open, 2 taken during a rebuild) and, from bit 4,
``k + 1`` for a node that is target ``k`` (see "Targets").

``heap : float64[2, cap, 2]`` holds two 4-ary min-heaps of ``(key, node)`` entries with lazy
deletion (``cap`` = n + max(n // 2, 64)): row 0 is ordered by the search key (``g + w*h``, or
the ANA* key), row 1 by ``f = g + h``. A node's improvement pushes a new entry instead of moving
the old one; entries of nodes that are no longer open are dropped when they reach the top, and
an entry of row 1 is current only while its f equals the node's ``g + h``. Because a newer entry
of a node always has a smaller key than its older ones, the first entry of a node to reach the
top is its current one. Between calls the top of each row is current, so ``min f`` over open is
``heap[1, 0, 0]`` -- except under weight 1, where row 0 is ordered by f already, row 1 is not
kept (``istate[I_FHEAP_ON] == 0``) and ``min f`` is ``heap[0, 0, 0]`` (:func:`open_min_f`).
When a row is full it is compacted to one entry per open node; the open list has at most
n - 1 nodes, so that always frees room. A weight, mode or (ANA*) incumbent change re-keys row 0.

``istate : int64[I_LEN]`` and ``fstate : float64[F_LEN]`` carry every scalar, the active
landmark list, the target table, the target landmark row and the improvement log, so one call
passes 8 arguments (numba's dispatch cost grows with the argument count).

Sources and targets
-------------------
A query starts from one or more *sources* ``(node, g0)`` (a point on an edge starts from both
ends of its edge with their partial costs) and ends at one of up to :data:`MAX_TARGETS`
*targets*. Target ``k`` is a node with a kind:

* ``ARRIVAL``: reaching the node ends the route there (the destination node, or any of its
  states in a turn-expanded graph); such a node is never opened;
* ``EXIT``: the destination lies on an edge leaving the node: expanding it with g offers the
  route ``g + exit_cost`` (the partial edge); the node is expanded like any other.

Invariants kept by :func:`run`
------------------------------
* Every open node had ``g + h < incumbent`` when it was opened; nodes whose ``f`` reached the
  incumbent later are discarded, unexpanded, when popped.
* ``istate[I_SIZE]`` is the number of open nodes; ``fstate[F_SUM_G]`` / ``fstate[F_SUM_H]``
  are the sums of g / h over them.
* ``fstate[F_INCUMBENT]`` is the cost of the best route known (+inf before one); the node and
  target that gave it are ``I_BEST_NODE`` / ``I_BEST_TARGET`` (-1 while the best route is one
  the caller installed, such as the instant route). Parent pointers form a tree rooted at the
  sources (g strictly decreases towards the root on positive costs and cannot loop on zero
  ones), so a route can be read back at any time (:func:`extract_route`).
* ``min(incumbent, min f over open)`` never exceeds the optimal cost (for an admissible h).
* Every new incumbent is logged (cost, bound, expansions, clock) in the improvement log.
"""

from __future__ import annotations

import math

import numpy as np
from llvmlite import ir
from numba import njit
from numba.core import cgutils, types
from numba.extending import intrinsic

# ---- status codes returned by run ----
LIMIT = 0  #: the call's expansion limit was reached
IMPROVED = 1  #: a new incumbent (returned only when I_RETURN_ON_IMPROVE is set)
PROVEN = 2  #: open list empty or min f >= incumbent: incumbent optimal (or no route if none)
TIME_UP = 3  #: the call's wall-clock instant I_UNTIL_NS was reached
STOPPED = 4  #: the stop flag I_STOP was set (cancelled)
GAP_REACHED = 5  #: the proven gap fell to the gap target F_GAP_TARGET

# ---- search modes ----
MODE_WEIGHTED = 0  #: key g + w*h (Anytime Weighted A*)
MODE_ANA = 1  #: ANA* key -(G - g)/h; greedy on h before the first route (ties arbitrary)

# ---- target kinds ----
ARRIVAL = 0
EXIT = 1

#: Most targets and active landmarks a query may have, and improvements logged per query.
MAX_TARGETS = 32
MAX_ACTIVE = 64
MAX_LANDMARKS = 64
MAX_LOG = 256

# ---- istate slots (int64) ----
I_GEN = 0  #: generation stamp of the current query (>= 1)
I_SIZE = 1  #: number of open nodes
I_MODE = 2  #: MODE_WEIGHTED or MODE_ANA (caller may change it between calls)
I_LIMIT = 3  #: most expansions this call may make (input; < 0 = no limit)
I_EXPANSIONS = 4  #: total expansions of this query
I_IMPROVEMENTS = 5  #: new incumbents found by the search (not counting an installed route)
I_KEYED_MODE = 6  #: mode the heap keys were computed with
I_PUSHES = 7
I_REOPENED = 8  #: pushes of a node that had been opened before
I_PRUNED = 9  #: successors skipped or open entries discarded because g + h >= incumbent
I_TOUCHED = 10  #: nodes stamped in this query (search footprint)
I_FHEAP_ON = 11  #: 1 when heap row 1 (ordered by f) is maintained, 0 when row 0 already is
I_HEAP0 = 12  #: entries in heap row 0 (>= open nodes: lazy deletion)
I_HEAP1 = 13  #: entries in heap row 1
I_COMPACTIONS = 14  #: full heap rows compacted
I_REKEYS = 15  #: open-list re-keys after a weight, mode or (ANA*) incumbent change
I_STOP = 16  #: set to 1 by another thread to stop the search (read with a volatile load)
I_UNTIL_NS = 17  #: monotonic-clock instant (ns) at which this call returns (input; 0 = none)
I_RETURN_ON_IMPROVE = 18  #: 1: return IMPROVED at each new incumbent (input)
I_BEST_NODE = 19  #: node whose route gave the incumbent (-1: an installed route, or none)
I_BEST_TARGET = 20  #: target index of that route (-1 as above)
I_LOG_COUNT = 21  #: improvements logged (the log keeps the first MAX_LOG)
I_N_ACTIVE = 22  #: active landmarks
I_N_TARGETS = 23
I_RUNAWAY = 24  #: 1 once the runaway guard has forced weight 1 (see run)
I_CLOCK_NS = 25  #: clock reading at the last check (ns)
I_ACTIVE = 32  #: I_ACTIVE .. I_ACTIVE + MAX_ACTIVE: active landmark indices
I_TNODE = I_ACTIVE + MAX_ACTIVE  #: target nodes
I_TKIND = I_TNODE + MAX_TARGETS  #: target kinds
I_TEDGE = I_TKIND + MAX_TARGETS  #: exit edge of an EXIT target (-1 for ARRIVAL)
I_TLM = I_TEDGE + MAX_TARGETS  #: I_TLM + 2l (+1): target row codes d(T -> l), d(l -> T)
I_LEN = I_TLM + 2 * MAX_LANDMARKS

# ---- fstate slots (float64) ----
F_WEIGHT = 0  #: weight w of the key g + w*h (input)
F_INCUMBENT = 1  #: cost of the best route known, +inf before (caller may lower it)
F_KEYED_WEIGHT = 2  #: weight / incumbent the heap keys were computed with
F_KEYED_INCUMBENT = 3
F_SUM_G = 4  #: sum of g over open
F_SUM_H = 5  #: sum of h over open
F_GC_SCALE = 6  #: (1 - 1e-9) / max_speed_mps: metres -> admissible seconds
F_LM_SLACK = 7  #: subtracted from the ALT term
F_T_X = 8  #: target position on the earth sphere (metres, see node_coords)
F_T_Y = 9
F_T_Z = 10
F_H_START = 11  #: smallest h over the sources (g0 + h(source))
F_GC_MARGIN = 12  #: chord_margin_m of the coords array (see node_coords)
F_GAP_TARGET = 13  #: stop once (incumbent - bound) <= this * incumbent (0 = only when proven)
F_RUNAWAY_FACTOR = 14  #: runaway guard: expansions > factor * touched + F_RUNAWAY_MIN
F_RUNAWAY_MIN = 15
F_LM_UNIT = 16  #: seconds per landmark code
F_TCOST = 17  #: F_TCOST + k: exit cost of target k (0 for ARRIVAL)
F_LOG = F_TCOST + MAX_TARGETS  #: F_LOG + 4i: cost, bound, expansions, clock ns
F_LEN = F_LOG + 4 * MAX_LOG

# ---- workspace columns ----
S_G = 0
S_H = 1
SI_STAMP = 4
SI_FLAGS = 5
SI_PARENT = 6
SI_PEDGE = 7
OPEN_MASK = 15
TARGET_SHIFT = 4

# ---- landmark row columns and the "no path" code ----
LM_TO = 0
LM_FROM = 1
LM_INF = 65535

#: Mean earth radius in metres (the value of planner.graph.EARTH_RADIUS_M, osmnx's).
_EARTH_RADIUS_M = 6_371_009.0
_INF = np.inf
#: Heap arity: a 4-ary heap is half as deep as a binary one and its children share cache lines.
_D = 4
#: Expansions between two readings of the clock and the stop flag (about 10 us of search).
_CHECK_EVERY = 64


# --------------------------------------------------------------------------------------------
# Intrinsics: prefetch hints, the monotonic clock, a volatile load


@intrinsic
def _prefetch_row(typingctx, arr, row):
    """Ask the CPU to start loading the cache line holding ``arr[row, 0, ...]``.

    A hint only (LLVM ``llvm.prefetch``, read, high locality): it never faults, even for an
    index past the end, and never changes a result. A search touches each node's rows in a
    few arrays spread over megabytes, so most of its time is spent waiting for memory; issuing
    the loads for all successors before using any of them lets those cache misses overlap.
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


@intrinsic
def _monotonic_ns(typingctx):
    """``clock_gettime(CLOCK_MONOTONIC)`` in nanoseconds: the clock ``time.perf_counter_ns``
    reads on Linux (PEP 418), so deadlines computed in Python and checked here agree."""

    def codegen(context, builder, signature, args):
        i64 = ir.IntType(64)
        i32 = ir.IntType(32)
        ts_t = ir.LiteralStructType([i64, i64])
        ts = cgutils.alloca_once(builder, ts_t)
        fnty = ir.FunctionType(i32, [i32, ts_t.as_pointer()])
        fn = cgutils.get_or_insert_function(builder.module, fnty, "clock_gettime")
        builder.call(fn, [i32(1), ts])  # CLOCK_MONOTONIC = 1 on Linux
        sec = builder.load(builder.gep(ts, [i32(0), i32(0)]))
        nsec = builder.load(builder.gep(ts, [i32(0), i32(1)]))
        return builder.add(builder.mul(sec, i64(1_000_000_000)), nsec)

    return types.int64(), codegen


@intrinsic
def _volatile_load(typingctx, arr, idx):
    """``arr[idx]`` read from memory every time (another thread may have written it)."""

    def codegen(context, builder, signature, args):
        aryty, idxty = signature.args
        ary = context.make_array(aryty)(context, builder, args[0])
        i = context.cast(builder, args[1], idxty, types.intp)
        ptr = cgutils.get_item_pointer(context, builder, aryty, ary, [i], wraparound=False)
        load = builder.load(ptr)
        load.volatile = True  # type: ignore[attr-defined]
        return load

    return arr.dtype(arr, idx), codegen


@njit(cache=True, nogil=True)
def monotonic_ns():
    """The kernel's clock, for tests and calibration."""
    return _monotonic_ns()


# --------------------------------------------------------------------------------------------
# Heuristic and keys


@njit(cache=True, nogil=True, inline="always")
def _lm_s(lm, v, k, col, unit):
    """Landmark code of row ``v`` as seconds (``inf`` for "no path"); not on the hot path."""
    q = lm[v, k, col]
    return _INF if q == LM_INF else np.float64(q) * unit


@njit(cache=True, nogil=True, inline="always")
def _alt_codes(v, lm, istate, n_act, n_lm):
    """max over the active landmarks of the two ALT differences, in landmark codes (int)."""
    best = -(1 << 30)
    if n_act == n_lm:  # all active: a contiguous loop the compiler vectorises
        for k in range(n_lm):
            d1 = np.int64(lm[v, k, LM_TO]) - istate[I_TLM + 2 * k]
            d2 = istate[I_TLM + 2 * k + 1] - np.int64(lm[v, k, LM_FROM])
            best = max(best, max(d1, d2))
    else:
        for j in range(n_act):
            k = istate[I_ACTIVE + j]
            d1 = np.int64(lm[v, k, LM_TO]) - istate[I_TLM + 2 * k]
            d2 = istate[I_TLM + 2 * k + 1] - np.int64(lm[v, k, LM_FROM])
            best = max(best, max(d1, d2))
    return best


@njit(cache=True, nogil=True, inline="always")
def _heuristic(v, coords, lm, istate, fstate, tx, ty, tz, margin, scale, slack, n_act):
    """Admissible estimate h(v) in seconds (see the module docstring)."""
    h = 0.0
    if scale > 0.0:
        dx = np.float64(coords[v, 0]) - tx
        dy = np.float64(coords[v, 1]) - ty
        dz = np.float64(coords[v, 2]) - tz
        h = (math.sqrt(dx * dx + dy * dy + dz * dz) - margin) * scale
    if n_act > 0:
        alt = np.float64(_alt_codes(v, lm, istate, n_act, lm.shape[1])) * fstate[F_LM_UNIT] - slack
        if alt > h:
            h = alt
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


# --------------------------------------------------------------------------------------------
# 4-ary heap rows


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
def _rebuild(heap, src, dst, n_src, state, si, mode, w, inc):
    """Write one freshly keyed entry per open node found in row ``src`` into row ``dst``
    (``src == dst`` compacts in place) and heapify it; returns the new entry count."""
    k = 0
    for i in range(n_src):
        v = np.int64(heap[src, i, 1])
        fl = si[v, SI_FLAGS]
        if fl & OPEN_MASK == 1:
            si[v, SI_FLAGS] = (fl & ~OPEN_MASK) | 2  # taken: later duplicates of v are skipped
            g = state[v, S_G]
            h = state[v, S_H]
            heap[dst, k, 0] = _key(mode, g, h, w, inc) if dst == 0 else g + h
            heap[dst, k, 1] = v
            k += 1
    for i in range(k):
        v = np.int64(heap[dst, i, 1])
        si[v, SI_FLAGS] = (si[v, SI_FLAGS] & ~OPEN_MASK) | 1
    for i in range((k - 2) // _D, -1, -1):
        _sift_down(heap, dst, i, heap[dst, i, 0], heap[dst, i, 1], k)
    return k


@njit(cache=True, nogil=True)
def _rekey(state, si, heap, istate, fstate):
    """Re-key row 0 for the current mode, weight and incumbent; keep row 1 as needed."""
    mode = istate[I_MODE]
    w = fstate[F_WEIGHT]
    inc = fstate[F_INCUMBENT]
    h0 = _rebuild(heap, 0, 0, istate[I_HEAP0], state, si, mode, w, inc)
    istate[I_REKEYS] += 1
    fon_now = 0 if (mode == MODE_WEIGHTED and w == 1.0) else 1
    h1 = istate[I_HEAP1]
    if fon_now and not istate[I_FHEAP_ON]:
        h1 = _rebuild(heap, 0, 1, h0, state, si, mode, w, inc)
    if not fon_now:
        h1 = 0
    istate[I_HEAP0] = h0
    istate[I_HEAP1] = h1
    istate[I_FHEAP_ON] = fon_now
    istate[I_KEYED_MODE] = mode
    fstate[F_KEYED_WEIGHT] = w
    fstate[F_KEYED_INCUMBENT] = inc


@njit(cache=True, nogil=True, inline="always")
def _clean_tops(heap, state, si, h0, h1, fon):
    """Drop entries of closed nodes (and, in row 1, outdated f values) from the tops."""
    while h0 > 0 and si[np.int64(heap[0, 0, 1]), SI_FLAGS] & OPEN_MASK == 0:
        _pop(heap, 0, h0)
        h0 -= 1
    if fon:
        while h1 > 0:
            v = np.int64(heap[1, 0, 1])
            if si[v, SI_FLAGS] & OPEN_MASK != 0 and heap[1, 0, 0] == state[v, S_G] + state[v, S_H]:
                break
            _pop(heap, 1, h1)
            h1 -= 1
    return h0, h1


# --------------------------------------------------------------------------------------------
# Starting a query


@njit(cache=True, nogil=True)
def _choose_active(lm, s, istate, fstate, k):
    """The ``k`` landmarks with the largest bound for (source ``s``, the target row in
    ``fstate``): the *active* landmarks (Goldberg & Harrelson 2005). Selection by repeated
    maximum (k and L are small)."""
    n_lm = lm.shape[1]
    if k > n_lm:
        k = n_lm
    if k > MAX_ACTIVE:
        k = MAX_ACTIVE
    score = np.empty(n_lm, np.int64)
    for li in range(n_lm):
        d1 = np.int64(lm[s, li, LM_TO]) - istate[I_TLM + 2 * li]
        d2 = istate[I_TLM + 2 * li + 1] - np.int64(lm[s, li, LM_FROM])
        score[li] = max(d1, d2)
    taken = np.zeros(n_lm, np.bool_)
    for j in range(k):
        pick = -1
        for li in range(n_lm):
            if not taken[li] and (pick < 0 or score[li] > score[pick]):
                pick = li
        taken[pick] = True
        istate[I_ACTIVE + j] = pick
    istate[I_N_ACTIVE] = k


@njit(cache=True, nogil=True)
def start_query(coords, lm, state, heap, istate, fstate, src_node, src_g):
    """Open a query: stamp the targets and the sources, open the sources. O(sources + targets).

    The caller has set ``I_GEN`` (a fresh generation), ``I_MODE``, ``F_WEIGHT``,
    ``F_GC_SCALE``, ``F_GC_MARGIN``, ``F_LM_SLACK``, the target position ``F_T_X/Y/Z``, the
    target landmark row, the target table (``I_N_TARGETS``, ``I_TNODE``, ``I_TKIND``,
    ``I_TEDGE``, ``F_TCOST``), the number of landmarks wanted active in ``I_N_ACTIVE``, and
    zeroed the other slots. The active landmarks are chosen here (:func:`_choose_active`, for
    the first source). A source that is also an ARRIVAL target is the caller's to handle (the
    route is empty). Returns the smallest ``g0 + h`` over the sources (``inf`` when the
    landmarks prove the target unreachable).
    """
    si = state.view(np.int32)
    if src_node.shape[0] > 0:
        _choose_active(lm, np.int64(src_node[0]), istate, fstate, istate[I_N_ACTIVE])
    gen = istate[I_GEN]
    fstate[F_INCUMBENT] = _INF
    n_t = istate[I_N_TARGETS]
    for k in range(n_t):
        t = istate[I_TNODE + k]
        si[t, SI_STAMP] = gen
        si[t, SI_FLAGS] = (k + 1) << TARGET_SHIFT
        si[t, SI_PARENT] = -1
        si[t, SI_PEDGE] = -1
        state[t, S_G] = _INF
        state[t, S_H] = 0.0  # an ARRIVAL target is never opened; an EXIT one gets h below
    tx, ty, tz = fstate[F_T_X], fstate[F_T_Y], fstate[F_T_Z]
    margin, scale, slack = fstate[F_GC_MARGIN], fstate[F_GC_SCALE], fstate[F_LM_SLACK]
    n_act = istate[I_N_ACTIVE]
    for k in range(n_t):
        t = istate[I_TNODE + k]
        if istate[I_TKIND + k] == EXIT:
            state[t, S_H] = _heuristic(
                t, coords, lm, istate, fstate, tx, ty, tz, margin, scale, slack, n_act
            )
    mode = istate[I_MODE]
    w = fstate[F_WEIGHT]
    istate[I_KEYED_MODE] = mode
    fstate[F_KEYED_WEIGHT] = w
    fstate[F_KEYED_INCUMBENT] = _INF
    fon = 0 if (mode == MODE_WEIGHTED and w == 1.0) else 1
    istate[I_FHEAP_ON] = fon
    h0 = 0
    h1 = 0
    n_open = 0
    touched = n_t
    sum_g = 0.0
    sum_h = 0.0
    best = _INF
    for i in range(src_node.shape[0]):
        s = np.int64(src_node[i])
        g0 = np.float64(src_g[i])
        fl = si[s, SI_FLAGS] if si[s, SI_STAMP] == gen else 0
        if si[s, SI_STAMP] != gen:
            si[s, SI_STAMP] = gen
            state[s, S_G] = _INF
            state[s, S_H] = _heuristic(
                s, coords, lm, istate, fstate, tx, ty, tz, margin, scale, slack, n_act
            )
            touched += 1
        k = (fl >> TARGET_SHIFT) - 1
        if k >= 0 and istate[I_TKIND + k] == ARRIVAL:
            continue  # the caller handles a source that is the destination
        if not g0 < state[s, S_G]:
            continue  # a cheaper source at the same node
        hs = state[s, S_H]
        if g0 + hs < best:
            best = g0 + hs
        if hs == _INF:
            continue  # the landmarks prove this source cannot reach the target
        if fl & OPEN_MASK == 1:  # the same node given twice: keep the cheaper start
            sum_g -= state[s, S_G]
            sum_h -= hs
            n_open -= 1
        state[s, S_G] = g0
        si[s, SI_PARENT] = -1
        si[s, SI_PEDGE] = -1
        si[s, SI_FLAGS] = (fl & ~OPEN_MASK) | 1
        n_open += 1
        sum_g += g0
        sum_h += hs
        _push(heap, 0, h0, _key(mode, g0, hs, w, _INF), s)
        h0 += 1
        if fon:
            _push(heap, 1, h1, g0 + hs, s)
            h1 += 1
    istate[I_SIZE] = n_open
    istate[I_HEAP0] = h0
    istate[I_HEAP1] = h1
    istate[I_TOUCHED] = touched
    istate[I_PUSHES] = n_open
    istate[I_BEST_NODE] = -1
    istate[I_BEST_TARGET] = -1
    fstate[F_SUM_G] = sum_g
    fstate[F_SUM_H] = sum_h
    fstate[F_H_START] = best
    return best


# --------------------------------------------------------------------------------------------
# The search loop


@njit(cache=True, nogil=True)
def run(indptr, head, cost, coords, lm, state, heap, istate, fstate):
    """Expand nodes until a limit or an event; return its status code (see the top).

    Parameters
    ----------
    indptr : int64[n + 1]; head : int32[m]; cost : float64[m]
        CSR road (or search) graph; ``cost`` >= 0, ``+inf`` for a closed edge.
    coords : float32[n, 3]
        Node positions in metres (:func:`node_coords`).
    lm : uint16[n, L, 2]
        Landmark distance codes (module docstring); L may be 0.
    state, heap, istate, fstate
        The workspace (module docstring). Inputs this call reads: ``I_LIMIT``, ``I_UNTIL_NS``,
        ``I_RETURN_ON_IMPROVE``, ``I_STOP``, ``I_MODE``, ``F_WEIGHT``, ``F_GAP_TARGET``.
    """
    si = state.view(np.int32)
    gen = istate[I_GEN]
    cap = heap.shape[1]
    if (
        istate[I_MODE] != istate[I_KEYED_MODE]
        or fstate[F_WEIGHT] != fstate[F_KEYED_WEIGHT]
        or (istate[I_MODE] == MODE_ANA and fstate[F_INCUMBENT] != fstate[F_KEYED_INCUMBENT])
    ):
        _rekey(state, si, heap, istate, fstate)
    mode = istate[I_MODE]
    w = fstate[F_WEIGHT]
    inc = fstate[F_INCUMBENT]
    n_open = istate[I_SIZE]
    h0 = istate[I_HEAP0]
    h1 = istate[I_HEAP1]
    fon = istate[I_FHEAP_ON]
    frow = 1 if fon else 0

    tx, ty, tz = fstate[F_T_X], fstate[F_T_Y], fstate[F_T_Z]
    margin, scale, slack = fstate[F_GC_MARGIN], fstate[F_GC_SCALE], fstate[F_LM_SLACK]
    n_act = istate[I_N_ACTIVE]
    limit = istate[I_LIMIT]
    until = istate[I_UNTIL_NS]
    on_improve = istate[I_RETURN_ON_IMPROVE]
    gap_target = fstate[F_GAP_TARGET]
    runaway_factor = fstate[F_RUNAWAY_FACTOR]
    runaway_min = fstate[F_RUNAWAY_MIN]
    expansions = istate[I_EXPANSIONS]
    done = 0
    sum_g = fstate[F_SUM_G]
    sum_h = fstate[F_SUM_H]
    pushes = 0
    reopened = 0
    pruned = 0
    touched = istate[I_TOUCHED]
    compactions = 0
    countdown = _CHECK_EVERY
    improved = False  # a new incumbent not yet logged (the log wants a clean heap top)
    status = -1
    while True:
        h0, h1 = _clean_tops(heap, state, si, h0, h1, fon)
        min_f = heap[frow, 0, 0] if n_open > 0 else _INF
        if improved:
            improved = False
            c = istate[I_LOG_COUNT]
            if c < MAX_LOG:
                base = F_LOG + 4 * c
                fstate[base] = inc
                fstate[base + 1] = min_f if min_f < inc else inc
                fstate[base + 2] = np.float64(expansions + done)
                fstate[base + 3] = np.float64(_monotonic_ns())
            istate[I_LOG_COUNT] = c + 1
            if on_improve:
                status = IMPROVED
        if n_open == 0 or min_f >= inc:
            status = PROVEN
        elif gap_target > 0.0 and inc < _INF and inc - min_f <= gap_target * inc:
            status = GAP_REACHED
        if status >= 0:
            break
        if limit >= 0 and done >= limit:
            status = LIMIT
            break
        countdown -= 1
        if countdown <= 0:
            countdown = _CHECK_EVERY
            if _volatile_load(istate, I_STOP) != 0:
                status = STOPPED
                break
            if until > 0:
                now = _monotonic_ns()
                istate[I_CLOCK_NS] = now
                if now >= until:
                    status = TIME_UP
                    break
            # Runaway guard: a weighted (or ANA*) search whose expansions outrun the nodes it
            # has touched keeps re-expanding nodes reached more cheaply later; under weight 1
            # (consistent h) a node is expanded at most once more, so switch to it.
            if (
                (mode != MODE_WEIGHTED or w != 1.0)
                and runaway_factor > 0.0
                and np.float64(expansions + done) > runaway_factor * touched + runaway_min
            ):
                mode = MODE_WEIGHTED
                w = 1.0
                istate[I_MODE] = mode
                fstate[F_WEIGHT] = w
                istate[I_RUNAWAY] = 1
                istate[I_SIZE] = n_open
                istate[I_HEAP0] = h0
                istate[I_HEAP1] = h1
                fstate[F_INCUMBENT] = inc
                _rekey(state, si, heap, istate, fstate)
                h0 = istate[I_HEAP0]
                h1 = istate[I_HEAP1]
                fon = istate[I_FHEAP_ON]
                frow = 1 if fon else 0
                continue

        u = np.int64(heap[0, 0, 1])
        _pop(heap, 0, h0)
        h0 -= 1
        if h0 > 0:  # the new top is usually the next node expanded: start loading its rows
            nxt = np.int64(heap[0, 0, 1])
            _prefetch_row(state, nxt)
            _prefetch_row(head, indptr[nxt])
            _prefetch_row(cost, indptr[nxt])
        fl = si[u, SI_FLAGS]
        si[u, SI_FLAGS] = fl & ~OPEN_MASK
        n_open -= 1
        gu = state[u, S_G]
        hu = state[u, S_H]
        sum_g -= gu
        sum_h -= hu
        if n_open == 0:  # cancel drift of the running sums
            sum_g = 0.0
            sum_h = 0.0
        if gu + hu >= inc:
            pruned += 1
            continue
        done += 1
        k = (fl >> TARGET_SHIFT) - 1
        if k >= 0:  # an EXIT target: the destination lies on one of u's edges
            cand = gu + fstate[F_TCOST + k]
            if cand < inc:
                inc = cand
                istate[I_BEST_NODE] = u
                istate[I_BEST_TARGET] = k
                istate[I_IMPROVEMENTS] += 1
                improved = True
        e_lo = indptr[u]
        e_hi = indptr[u + 1]
        for e in range(e_lo, e_hi):  # issue every successor's loads before using any of them
            v = np.int64(head[e])
            _prefetch_row(state, v)
            if scale > 0.0:
                _prefetch_row(coords, v)
            if n_act > 0:
                _prefetch_row(lm, v)
        for e in range(e_lo, e_hi):
            v = np.int64(head[e])
            nv = gu + cost[e]
            if si[v, SI_STAMP] != gen:
                si[v, SI_STAMP] = gen
                si[v, SI_FLAGS] = 0
                state[v, S_G] = _INF
                state[v, S_H] = _heuristic(
                    v, coords, lm, istate, fstate, tx, ty, tz, margin, scale, slack, n_act
                )
                touched += 1
            old = state[v, S_G]
            if not nv < old:  # also skips closed (inf-cost) edges
                continue
            fv = si[v, SI_FLAGS]
            kv = (fv >> TARGET_SHIFT) - 1
            if kv >= 0 and istate[I_TKIND + kv] == ARRIVAL:
                if nv < inc:
                    inc = nv
                    state[v, S_G] = nv
                    si[v, SI_PARENT] = u
                    si[v, SI_PEDGE] = e
                    istate[I_BEST_NODE] = v
                    istate[I_BEST_TARGET] = kv
                    istate[I_IMPROVEMENTS] += 1
                    improved = True
                continue
            hv = state[v, S_H]
            if nv + hv >= inc:
                pruned += 1
                continue
            state[v, S_G] = nv
            si[v, SI_PARENT] = u
            si[v, SI_PEDGE] = e
            if fv & OPEN_MASK:
                sum_g += nv - old
            else:
                if old < _INF:
                    reopened += 1
                si[v, SI_FLAGS] = fv | 1
                n_open += 1
                sum_g += nv
                sum_h += hv
            pushes += 1
            if h0 == cap:
                h0 = _rebuild(heap, 0, 0, h0, state, si, mode, w, inc)
                compactions += 1
            _push(heap, 0, h0, _key(mode, nv, hv, w, inc), v)
            h0 += 1
            if fon:
                if h1 == cap:
                    h1 = _rebuild(heap, 1, 1, h1, state, si, mode, w, inc)
                    compactions += 1
                _push(heap, 1, h1, nv + hv, v)
                h1 += 1

    istate[I_SIZE] = n_open
    istate[I_HEAP0] = h0
    istate[I_HEAP1] = h1
    istate[I_EXPANSIONS] = expansions + done
    istate[I_PUSHES] += pushes
    istate[I_REOPENED] += reopened
    istate[I_PRUNED] += pruned
    istate[I_TOUCHED] = touched
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
def extract_route(state, node, max_len):
    """Walk parent pointers from ``node`` back to its source.

    Returns ``(nodes int64[k + 1], edges int64[k])`` in travel order (``nodes[0]`` a source),
    or empty arrays when the walk is longer than ``max_len`` edges (cannot happen for a valid
    search: parent pointers form a tree).
    """
    si = state.view(np.int32)
    k = 0
    v = node
    while si[v, SI_PARENT] >= 0 and k < max_len:
        v = si[v, SI_PARENT]
        k += 1
    if si[v, SI_PARENT] >= 0:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    nodes = np.empty(k + 1, np.int64)
    edges = np.empty(k, np.int64)
    v = node
    for i in range(k, 0, -1):
        nodes[i] = v
        edges[i - 1] = si[v, SI_PEDGE]
        v = si[v, SI_PARENT]
    nodes[0] = v
    return nodes, edges


@njit(cache=True, nogil=True)
def route_cost(cost, edges):
    """Sum of ``cost`` over ``edges`` in travel order (what the search adds up, exactly)."""
    total = 0.0
    for i in range(edges.shape[0]):
        total += cost[edges[i]]
    return total


# --------------------------------------------------------------------------------------------
# The instant route: origin -> landmark -> destination along the landmarks' trees


@njit(cache=True, nogil=True)
def _tree_route(
    tail, head, cost, tree_to, tree_from, landmark, li, s, t, state, gen, max_len, out_e, back
):
    """Route s -> landmark li -> t along the landmark's shortest-path trees, cut where the two
    halves meet.

    ``tree_to[li, v]`` is the edge leaving v on a shortest path v -> landmark and
    ``tree_from[li, v]`` the edge entering v on a shortest path landmark -> v (-1 at the
    landmark and where there is no path). The first half is walked forwards from s, the second
    backwards from t, one step each in turn, until one walk reaches a node the other has
    visited: the route is the first walk up to that node and the second from it, which drops
    the stretch both halves share (driving towards the landmark and back). Every common node
    gives a real route no dearer than the full one, and a nearby pair meets after a few steps
    instead of two walks to a landmark across the map. Writes the edges into ``out_e``;
    returns ``(edge count, cost)``, or ``(-1, inf)`` when a tree does not connect the pair.
    Marks visited nodes in the workspace with generation ``gen`` (``SI_FLAGS`` 1 or 2 for the
    walk, ``SI_PARENT`` its position along it).
    """
    si = state.view(np.int32)
    n1 = 0  # edges walked from s (in out_e)
    n2 = 0  # edges walked back from t (in back)
    a = s
    b = t
    si[a, SI_STAMP] = gen
    si[a, SI_FLAGS] = 1
    si[a, SI_PARENT] = 0
    if si[b, SI_STAMP] == gen:  # s == t cannot happen (the session answers it), but be safe
        return 0, 0.0
    si[b, SI_STAMP] = gen
    si[b, SI_FLAGS] = 2
    si[b, SI_PARENT] = 0
    meet = -1
    done1 = False
    done2 = False
    while meet < 0:
        if done1 and done2:
            return -1, _INF  # both walks ended at the landmark without meeting: impossible
        if not done1:
            if a == landmark:
                done1 = True
            else:
                e = tree_to[li, a]
                if e < 0 or n1 >= max_len:
                    return -1, _INF  # s does not reach the landmark
                out_e[n1] = e
                n1 += 1
                a = np.int64(head[e])
                if si[a, SI_STAMP] == gen and si[a, SI_FLAGS] == 2:
                    meet = a
                    break
                si[a, SI_STAMP] = gen
                si[a, SI_FLAGS] = 1
                si[a, SI_PARENT] = n1
        if not done2:
            if b == landmark:
                done2 = True
            else:
                e = tree_from[li, b]
                if e < 0 or n2 >= max_len:
                    return -1, _INF  # the landmark does not reach t
                back[n2] = e
                n2 += 1
                b = np.int64(tail[e])
                if si[b, SI_STAMP] == gen and si[b, SI_FLAGS] == 1:
                    meet = b
                    break
                si[b, SI_STAMP] = gen
                si[b, SI_FLAGS] = 2
                si[b, SI_PARENT] = n2
    # the node where the walks met: reached last by the first walk (it was the second's) or by
    # the second (it was the first's); its mark holds its position along the other walk
    if si[meet, SI_FLAGS] == 2:
        p1, p2 = n1, si[meet, SI_PARENT]
    else:
        p1, p2 = si[meet, SI_PARENT], n2
    if p1 + p2 > max_len:
        return -1, _INF
    total = 0.0
    for i in range(p1):
        total += cost[out_e[i]]
    for i in range(p2):
        e = back[p2 - 1 - i]
        out_e[p1 + i] = e
        total += cost[e]
    return p1 + p2, total


@njit(cache=True, nogil=True)
def instant_route(
    tail,
    head,
    cost,
    lm,
    lm_nodes,
    tree_to,
    tree_from,
    state,
    istate,
    fstate,
    src_node,
    src_g,
    out_e,
):
    """The cheapest origin -> landmark -> destination route over sources, targets and the best
    landmarks (by the stored distance bound), each with its loop cut (:func:`_tree_route`).

    Tries, for every (source, target) pair, the landmarks in order of
    ``g0 + d(s -> li) + d(li -> t) + exit cost`` and walks the :data:`_INSTANT_TRIES` best
    combinations. Uses generations ``istate[I_GEN] .. + tries`` of the workspace; the caller
    starts the main search with a later one. Returns ``(edge count, cost, source index,
    target index)``; the edges are in ``out_e``. Count -1 when no landmark tree connects any
    source to any target (the pair is outside the landmarks' reach).
    """
    n_lm = lm.shape[1]
    n_s = src_node.shape[0]
    n_t = istate[I_N_TARGETS]
    combos = n_s * n_t * n_lm
    if combos == 0:
        return -1, _INF, -1, -1
    est = np.empty(combos, np.float64)
    unit = fstate[F_LM_UNIT]
    for i in range(n_s):
        s = np.int64(src_node[i])
        for k in range(n_t):
            t = istate[I_TNODE + k]
            extra = src_g[i] + fstate[F_TCOST + k]
            for li in range(n_lm):
                est[(i * n_t + k) * n_lm + li] = (
                    extra + _lm_s(lm, s, li, LM_TO, unit) + _lm_s(lm, t, li, LM_FROM, unit)
                )
    order = np.argsort(est)
    max_len = out_e.shape[0]
    trial = np.empty(max_len, np.int64)
    back = np.empty(max_len, np.int64)
    best_n = -1
    best_cost = _INF
    best_s = -1
    best_t = -1
    gen = istate[I_GEN]
    tries = 0
    for j in range(combos):
        idx = order[j]
        if est[idx] == _INF or tries >= _INSTANT_TRIES:
            break
        if est[idx] >= best_cost:
            break  # the walk can only cost as much as its estimate (up to float rounding)
        i = idx // (n_t * n_lm)
        k = (idx // n_lm) % n_t
        li = idx % n_lm
        s = np.int64(src_node[i])
        t = istate[I_TNODE + k]
        landmark = np.int64(lm_nodes[li])
        cnt, c = _tree_route(
            tail,
            head,
            cost,
            tree_to,
            tree_from,
            landmark,
            li,
            s,
            t,
            state,
            gen + tries,
            max_len,
            trial,
            back,
        )
        tries += 1
        if cnt < 0:
            continue
        c += src_g[i] + fstate[F_TCOST + k]
        if c < best_cost:
            best_cost = c
            best_n = cnt
            best_s = i
            best_t = k
            for q in range(cnt):
                out_e[q] = trial[q]
    return best_n, best_cost, best_s, best_t


#: Landmark routes walked by :func:`instant_route` (the best by their distance bound).
_INSTANT_TRIES = 3
#: Generations :func:`instant_route` may use (the session reserves them).
INSTANT_GENERATIONS = _INSTANT_TRIES


# --------------------------------------------------------------------------------------------
# Opening a query in one call, and the stats between steps


@njit(cache=True, nogil=True)
def open_query(
    tail,
    head,
    cost,
    coords,
    lm,
    lm_nodes,
    tree_to,
    tree_from,
    state,
    heap,
    istate,
    fstate,
    src_node,
    src_g,
    route_buf,
):
    """Open a query in one call: the instant route (when landmarks are given), then
    :func:`start_query` with the next generation, then the instant route as the incumbent.

    The caller has set everything :func:`start_query` needs except ``I_GEN``, which holds the
    first of the ``INSTANT_GENERATIONS + 1`` generations reserved for this query. A plain node
    query may leave the target table to this call: ``I_N_TARGETS = 0`` and the destination in
    ``I_TNODE`` (one ARRIVAL target; its position and landmark row are filled in here).
    ``tail`` is the int32 tail node of every edge (the instant route walks edges backwards).
    Returns ``(instant edge count, instant cost, h_start, source index, target index)``; the
    instant route's edges are in ``route_buf`` (count -1: none).
    """
    if istate[I_N_TARGETS] == 0:
        t = istate[I_TNODE]
        istate[I_N_TARGETS] = 1
        istate[I_TKIND] = ARRIVAL
        istate[I_TEDGE] = -1
        fstate[F_T_X] = np.float64(coords[t, 0])
        fstate[F_T_Y] = np.float64(coords[t, 1])
        fstate[F_T_Z] = np.float64(coords[t, 2])
        for li in range(lm.shape[1]):
            istate[I_TLM + 2 * li] = lm[t, li, LM_TO]
            istate[I_TLM + 2 * li + 1] = lm[t, li, LM_FROM]
    count = -1
    inst = _INF
    src_i = -1
    tgt_i = -1
    first = istate[I_GEN]
    if lm.shape[1] > 0:
        count, inst, src_i, tgt_i = instant_route(
            tail,
            head,
            cost,
            lm,
            lm_nodes,
            tree_to,
            tree_from,
            state,
            istate,
            fstate,
            src_node,
            src_g,
            route_buf,
        )
    istate[I_GEN] = first + INSTANT_GENERATIONS
    h_start = start_query(coords, lm, state, heap, istate, fstate, src_node, src_g)
    if count >= 0:
        fstate[F_INCUMBENT] = inst
    return count, inst, h_start, src_i, tgt_i


@njit(cache=True, nogil=True)
def collect_log(fstate, lo, hi, last, route_cost, bound, started_s, weight, rows, at):
    """Write improvement-log entries ``lo .. hi-1`` as rows ``at ..`` of ``rows``
    (``planner.results.ImprovementLog`` columns: elapsed ms since ``started_s``, expansions,
    cost, bound, gap, weight, source 1 = search) and return the running lower bound.

    Entry ``last`` (the newest) costs at most ``route_cost``, the cost of the route read back
    (``inf``: none). Each entry's bound is at least the running bound ``bound`` and at most its
    cost; the running bound is the largest so far."""
    for i in range(lo, hi):
        base = F_LOG + 4 * i
        cost = fstate[base]
        if i == last and route_cost < cost:
            cost = route_cost
        b = fstate[base + 1]
        if b < bound:
            b = bound
        if b > cost:
            b = cost
        if b > bound:
            bound = b
        r = at + i - lo
        rows[r, 0] = (fstate[base + 3] * 1e-9 - started_s) * 1000.0
        rows[r, 1] = fstate[base + 2]
        rows[r, 2] = cost
        rows[r, 3] = b
        rows[r, 4] = 0.0 if cost <= 0.0 else max(0.0, (cost - b) / cost)
        rows[r, 5] = weight
        rows[r, 6] = 1.0
    return bound


@njit(cache=True, nogil=True)
def refresh_stats(heap, istate, fstate, v):
    """Update the kernel's part of a stats vector (``planner.results.STATS_FIELDS`` order):
    open list size and means, min f, expansions, nodes touched, reopenings, and the running
    lower bound ``max(bound, min(incumbent, min f))``; ``v[0]`` (the incumbent) is the
    session's (the cost of the route it holds)."""
    n_open = istate[I_SIZE]
    min_f = (heap[1 if istate[I_FHEAP_ON] else 0, 0, 0]) if n_open > 0 else _INF
    v[2] = np.float64(n_open)
    v[3] = fstate[F_SUM_G] / n_open if n_open > 0 else 0.0
    v[4] = fstate[F_SUM_H] / n_open if n_open > 0 else 0.0
    v[5] = min_f
    v[7] = np.float64(istate[I_EXPANSIONS])
    v[18] = np.float64(istate[I_TOUCHED])
    v[19] = np.float64(istate[I_REOPENED])
    b = min(v[0], min_f)
    if b < _INF and b > v[1]:
        v[1] = b


# --------------------------------------------------------------------------------------------
# Workspace and coordinates


def new_workspace(n_nodes: int) -> tuple[np.ndarray, ...]:
    """Allocate ``(state, heap, istate, fstate)`` for a graph of ``n_nodes``.

    ``state`` rows are 32 bytes and the array starts on a 64-byte boundary, so a node's record
    never straddles two cache lines. Stamps start at 0 and generations at 1, so no row is valid
    until a query stamps it.
    """
    n = max(int(n_nodes), 1)
    raw = np.zeros(n * 4 + 8, dtype=np.float64)
    offset = (-raw.ctypes.data % 64) // 8
    state = raw[offset : offset + n * 4].reshape(n, 4)
    heap = np.zeros((2, n + max(n // 2, 64), 2), dtype=np.float64)
    istate = np.zeros(I_LEN, dtype=np.int64)
    fstate = np.zeros(F_LEN, dtype=np.float64)
    return state, heap, istate, fstate


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
    xyz, margin_m, _ = sphere_points(lat_deg, lon_deg)
    return np.ascontiguousarray(xyz, dtype=np.float32), margin_m


def sphere_points(
    lat_deg: np.ndarray, lon_deg: np.ndarray, centre: np.ndarray | None = None
) -> tuple[np.ndarray, float, np.ndarray]:
    """``(xyz float64[n, 3], chord_margin_m, centre)``: points on the sphere in metres, shifted
    by ``centre`` (default their mean; pass the graph's to place other points the same way)."""
    lat = np.radians(np.asarray(lat_deg, dtype=np.float64))
    lon = np.radians(np.asarray(lon_deg, dtype=np.float64))
    c = np.cos(lat)
    xyz = np.column_stack((c * np.cos(lon), c * np.sin(lon), np.sin(lat))) * _EARTH_RADIUS_M
    if centre is None:
        centre = xyz.mean(axis=0) if xyz.shape[0] else np.zeros(3)
    xyz = xyz - centre
    biggest = float(np.max(np.abs(xyz))) if xyz.size else 0.0
    margin_m = 4.0 * biggest * 2.0**-24
    return xyz, margin_m, centre


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


@njit(cache=True, nogil=True)
def route_polyline(nodes, edges, lat, lon, geom_indptr, geom_lat, geom_lon):
    """(lon, lat) rows of a route's full edges: each edge's tail, its interior shape points,
    and the last edge's head (the shared point between two edges written once)."""
    k = edges.shape[0]
    total = 1
    for i in range(k):
        e = edges[i]
        total += 1 + geom_indptr[e + 1] - geom_indptr[e]
    out = np.empty((total, 2), dtype=np.float64)
    at = 0
    for i in range(k):
        e = edges[i]
        u = nodes[i]
        out[at, 0] = lon[u]
        out[at, 1] = lat[u]
        at += 1
        for j in range(geom_indptr[e], geom_indptr[e + 1]):
            out[at, 0] = geom_lon[j]
            out[at, 1] = geom_lat[j]
            at += 1
    last = nodes[k]
    out[at, 0] = lon[last]
    out[at, 1] = lat[last]
    return out
