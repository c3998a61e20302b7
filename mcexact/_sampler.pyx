# cython: language_level=3, boundscheck=False, wraparound=False, cdivision=True, initializedcheck=False
"""Monte Carlo kernels: draws of the interest statistics with the nuisance statistics held fixed.

Design
------
Two engines, both recording only the interest statistic T = Z'y of each draw (never y):

* `direct_draws` walks the pruned nuisance network of ``mcexact/_network.pyx`` from its root,
  choosing at each stage an arc with its transition probability C(m, y) B(successor) / B(node)
  (Mehta, Patel & Senchaudhuri 2000). Every walk is an independent exact draw from the conditional
  distribution: no burn-in, no autocorrelation. A tilted target only changes the probabilities.
* Markov chains on response vectors with the nuisance statistics fixed, for when the nuisance
  network itself is too large. Their moves keep W'y (and the events of every stratum) fixed by
  construction:
  - *swap* (`run_unit_swaps`; nuisance = intercept and/or strata only): an event trial and a
    non-event trial of one stratum exchange their outcomes, exact for the null and for tilted
    targets (see the function);
  - *block* (`run_chain`; integer nuisance columns): a random block of r groups is redrawn from
    its exact conditional distribution given the rest, over the small fiber
    {x : W_A'x = W_A'y_A, stratum counts of A fixed, 0 <= x <= m_A} enumerated by depth-first
    search with bound pruning. A Gibbs move: always accepted. The block comes from one stratum,
    from anywhere, or (with fixed strata) from a few distinct strata, about r / S groups from each
    ("cross-strata" moves): a block from anywhere holds one or two groups per stratum, all frozen by
    their strata's fixed counts, while a within-stratum block must also keep its own nuisance sums;
    a block from two strata lets events trade nuisance sums between them. A block whose fiber is
    too large to enumerate is left as it is; that decision depends on the fiber only, so the chain
    stays reversible. Block moves need not connect the whole fiber of the data (irreducibility is
    not guaranteed): the diagnostics compare chains and exact answers.

Random numbers come from a numpy BitGenerator through its `bitgen_t` capsule, under its lock.
"""

import numpy as np
cimport numpy as cnp
from cpython.pycapsule cimport PyCapsule_GetPointer, PyCapsule_IsValid
from libc.math cimport exp, log, INFINITY
from libc.stdint cimport int32_t, int64_t, uint32_t, uint64_t
from libc.stdlib cimport malloc, free
from numpy.random cimport bitgen_t

from mcexact._random cimport draw_bounded, draw_two_bounded, draw_uniform

cnp.import_array()

cdef enum:
    # Largest block a move may redraw, and how large a block's fiber (or its search) may be
    # before the move is skipped: enumeration costs grow with the fiber, and blocks this large
    # already mix well.
    C_MAX_BLOCK = 32
    C_MAX_FIBER = 4096
    C_MAX_VISITS = 200000

MAX_BLOCK = C_MAX_BLOCK
MAX_FIBER = C_MAX_FIBER


cdef bitgen_t *_bitgen(object bit_generator) except NULL:
    capsule = bit_generator.capsule
    if not PyCapsule_IsValid(capsule, "BitGenerator"):
        raise ValueError("mcexact: not a numpy BitGenerator")
    return <bitgen_t *> PyCapsule_GetPointer(capsule, "BitGenerator")


def build_alias(const int64_t[::1] node_arc_ptr, const double[::1] arc_prob):
    """Walker's alias tables (Vose's construction, Vose 1991) for each node's arcs.

    For a node with k arcs, a uniform u picks slot ``floor(u k)`` and its fractional part decides
    between the slot's own arc (probability ``alias_prob``) and its alias (``alias_arc``, an arc
    index): one uniform and no search per stage. Probabilities are renormalised per node.

    Returns
    -------
    alias_prob : (n_arcs,) float64
    alias_arc : (n_arcs,) int64, global arc indices
    """
    cdef Py_ssize_t n_nodes = node_arc_ptr.shape[0] - 1
    cdef Py_ssize_t n_arcs = arc_prob.shape[0]
    cdef double[::1] aprob = np.empty(n_arcs)
    cdef int64_t[::1] aarc = np.empty(n_arcs, dtype=np.int64)
    cdef Py_ssize_t i, a, lo, hi, k, ns, nl
    cdef Py_ssize_t max_k = 1
    for i in range(n_nodes):
        if node_arc_ptr[i + 1] - node_arc_ptr[i] > max_k:
            max_k = node_arc_ptr[i + 1] - node_arc_ptr[i]
    # Scratch for one node at a time (indexed from its first arc), not for all arcs: the tables
    # of a network of tens of millions of arcs then need no more memory than their own.
    cdef double[::1] scaled_buf = np.empty(max_k)
    cdef int64_t[::1] small_buf = np.empty(max_k, dtype=np.int64)
    cdef int64_t[::1] large_buf = np.empty(max_k, dtype=np.int64)
    cdef double *scaled
    cdef int64_t *small
    cdef int64_t *large
    cdef int64_t s, l
    cdef double total
    with nogil:
        for i in range(n_nodes):
            lo = node_arc_ptr[i]
            hi = node_arc_ptr[i + 1]
            k = hi - lo
            if k == 0:
                continue
            # scaled[j]: arc lo + j's probability times k; small, large: arc indices.
            scaled = &scaled_buf[0]
            small = &small_buf[0]
            large = &large_buf[0]
            total = 0.0
            for a in range(lo, hi):
                total += arc_prob[a]
            ns = 0
            nl = 0
            for a in range(lo, hi):
                scaled[a - lo] = arc_prob[a] * k / total
                aarc[a] = a
                if scaled[a - lo] < 1.0:
                    small[ns] = a
                    ns += 1
                else:
                    large[nl] = a
                    nl += 1
            while ns > 0 and nl > 0:
                ns -= 1
                s = small[ns]
                l = large[nl - 1]
                aprob[s] = scaled[s - lo]
                aarc[s] = l
                scaled[l - lo] = (scaled[l - lo] + scaled[s - lo]) - 1.0
                if scaled[l - lo] < 1.0:
                    nl -= 1
                    small[ns] = l
                    ns += 1
            while nl > 0:
                nl -= 1
                aprob[large[nl]] = 1.0
            while ns > 0:                       # rounding leftovers
                ns -= 1
                aprob[small[ns]] = 1.0
    return np.asarray(aprob), np.asarray(aarc)


def direct_draws(object bit_generator,
                 const int64_t[::1] node_arc_ptr,
                 const int64_t[::1] arc_succ,
                 const int32_t[::1] arc_y,
                 const double[::1] alias_prob,
                 const int64_t[::1] alias_arc,
                 const int64_t[:, ::1] z,
                 int64_t[:, ::1] out):
    """Fill `out` (n_draws, q) with independent draws of T by walks through the nuisance network.

    Parameters
    ----------
    bit_generator : numpy.random.BitGenerator
    node_arc_ptr : (n_nodes + 1,) arcs of global node i are node_arc_ptr[i]:node_arc_ptr[i + 1]
    arc_succ : (n_arcs,) global index of each arc's successor
    arc_y : (n_arcs,) events the arc puts in its stage's group
    alias_prob, alias_arc : (n_arcs,) each node's alias table over its arcs (`build_alias`)
    z : (K, q) coded interest covariates per stage
    out : (n_draws, q) int64, written
    """
    cdef bitgen_t *bg = _bitgen(bit_generator)
    cdef Py_ssize_t n_draws = out.shape[0]
    cdef Py_ssize_t q = z.shape[1]
    cdef Py_ssize_t K = z.shape[0]
    cdef Py_ssize_t r0, w, n_w, k, j
    cdef int64_t a, lo, n_arc, y, slot, pick
    cdef double u
    # Walks are advanced 16 at a time, stage by stage: each stage of one walk is a chain of
    # dependent loads (node -> its arcs -> the chosen arc's successor), and interleaving
    # independent walks lets the processor overlap those loads.
    cdef int64_t node[16]
    # Every walk takes exactly K uniforms, drawn walk after walk before the walks advance, so the
    # stream's use does not depend on how draws are split between calls (continuations are exact).
    cdef double *uniforms = <double *> malloc(16 * K * sizeof(double)) if K > 0 else NULL
    if K > 0 and uniforms == NULL:
        raise MemoryError("mcexact: out of memory for the direct sampler")
    with bit_generator.lock, nogil:
        for r0 in range(0, n_draws, 16):
            n_w = 16 if n_draws - r0 > 16 else n_draws - r0
            for w in range(n_w):
                node[w] = 0
                for j in range(q):
                    out[r0 + w, j] = 0
                for k in range(K):
                    uniforms[w * K + k] = draw_uniform(bg)
            for k in range(K):
                for w in range(n_w):
                    lo = node_arc_ptr[node[w]]
                    n_arc = node_arc_ptr[node[w] + 1] - lo
                    a = lo
                    if n_arc > 1:
                        # One uniform: its integer part picks a slot, its fraction the slot's arc
                        # or the slot's alias. The choice is written without a branch: it is a
                        # coin flip for the processor.
                        u = uniforms[w * K + k] * n_arc
                        slot = <int64_t> u
                        slot -= slot >= n_arc
                        a = lo + slot
                        pick = (u - slot) >= alias_prob[a]
                        a += pick * (alias_arc[a] - a)
                    y = arc_y[a]
                    if q == 1:
                        out[r0 + w, 0] += y * z[k, 0]
                    else:
                        for j in range(q):
                            out[r0 + w, j] += y * z[k, j]
                    node[w] = arc_succ[a]
    free(uniforms)


cdef struct Chain:
    # Problem and state. A group's fields sit together in one record of `stride` int64
    # [trials, events, stratum, nuisance..., interest...], so a move touching a random group reads
    # one or two cache lines however many groups there are.
    int64_t K
    int64_t p
    int64_t q
    int64_t stride
    int64_t *rec              # K x stride
    const int64_t *start      # H: first group of each stratum
    const int64_t *size       # H: groups in each stratum
    const double *theta       # K: tilt per unit event in each group
    bint tilted
    const double *log_fact    # log k! for k = 0..max m
    bint fixed
    int64_t *T
    # Block scratch
    int64_t r
    int64_t *block
    int64_t *cons            # block x n_cons constraint coefficients
    int64_t n_cons
    int64_t *target
    int64_t *partial
    int64_t *rem_lo          # (r + 1) x n_cons suffix bounds
    int64_t *rem_hi
    int64_t *x
    int64_t *fiber           # C_MAX_FIBER x r feasible blocks
    double *fiber_lw
    int64_t n_fiber
    int64_t visits
    bint overflow
    # Block selection (fixed strata only). Informative strata: two or more groups and both
    # outcomes present (0 < events < trials), in stratum order, with their cumulative group counts
    # (size-proportional choice); per stratum, the count of the rarer outcome ("anchor" trials)
    # and which outcome that is.
    int64_t n_inf
    const int64_t *inf            # n_inf strata
    const int64_t *inf_cum        # n_inf + 1 cumulative sizes
    const int64_t *anchor_total   # H
    const int64_t *anchor_events  # H: 1 if the anchor trials are the events, 0 the non-events
    # Anchored choice: a Fenwick (binary indexed) tree over the groups of their anchor trials
    # a_g, so that a random anchor trial of a stratum costs O(log K) rather than a scan of the
    # stratum; kept in step with y by change_y. (Fenwick, P. M. (1994). A new data structure for
    # cumulative frequency tables. Software: Practice and Experience 24(3), 327-336.)
    int64_t *fen                  # K + 1
    int64_t fen_top               # largest power of two <= K
    int64_t cross_quarters        # moves in 4 that take the block from several strata
    int64_t n_cross               # strata per cross-strata block
    bint anchored
    # Rao-Blackwellized moments (optional): after each move, E[D | y outside the block] and
    # E[D D' | y outside the block] for D = T - ref, the moments of the fiber the block was
    # redrawn from (q + q * q values in `rb`).
    bint want_rb
    const int64_t *ref
    double *rb
    double *dev


cdef inline double log_binom(const Chain *c, int64_t m, int64_t y) noexcept nogil:
    return c.log_fact[m] - c.log_fact[y] - c.log_fact[m - y]


cdef inline void fen_add(Chain *c, int64_t g, int64_t d) noexcept nogil:
    cdef int64_t i = g + 1
    while i <= c.K:
        c.fen[i] += d
        i += i & (-i)


cdef inline int64_t fen_prefix(const Chain *c, int64_t g) noexcept nogil:
    """Anchor trials of groups 0..g-1."""
    cdef int64_t i = g, total = 0
    while i > 0:
        total += c.fen[i]
        i -= i & (-i)
    return total


cdef inline int64_t fen_search(const Chain *c, int64_t target) noexcept nogil:
    """The least group g with fen_prefix(g + 1) > target (0 <= target < all anchor trials)."""
    cdef int64_t pos = 0, step = c.fen_top
    while step > 0:
        if pos + step <= c.K and c.fen[pos + step] <= target:
            pos += step
            target -= c.fen[pos]
        step >>= 1
    return pos


cdef inline void change_y(Chain *c, int64_t g, int64_t delta) noexcept nogil:
    """Add `delta` events to group g, keeping T (and the anchor counts) in step."""
    cdef Py_ssize_t j
    cdef int64_t *r = c.rec + g * c.stride
    r[1] += delta
    for j in range(c.q):
        c.T[j] += delta * r[3 + c.p + j]
    if c.anchored:
        fen_add(c, g, delta if c.anchor_events[r[2]] else -delta)


cdef void enumerate_block(Chain *c, int64_t k, double lw) noexcept nogil:
    """Depth-first search over block position k.. for x meeting the block's constraints."""
    cdef int64_t g, x, lim, need, j
    cdef bint ok
    cdef int64_t *part = c.partial
    if c.overflow:
        return
    c.visits += 1
    if c.visits > C_MAX_VISITS:
        c.overflow = True
        return
    if k == c.r:
        for j in range(c.n_cons):
            if part[j] != c.target[j]:
                return
        if c.n_fiber >= C_MAX_FIBER:
            c.overflow = True
            return
        for j in range(c.r):
            c.fiber[c.n_fiber * c.r + j] = c.x[j]
        c.fiber_lw[c.n_fiber] = lw
        c.n_fiber += 1
        return
    g = c.block[k]
    lim = c.rec[g * c.stride]
    for x in range(lim + 1):
        ok = True
        for j in range(c.n_cons):
            need = c.target[j] - part[j] - x * c.cons[k * c.n_cons + j]
            if need < c.rem_lo[(k + 1) * c.n_cons + j] or need > c.rem_hi[(k + 1) * c.n_cons + j]:
                ok = False
                break
        if not ok:
            continue
        for j in range(c.n_cons):
            part[j] += x * c.cons[k * c.n_cons + j]
        c.x[k] = x
        enumerate_block(c, k + 1, lw + log_binom(c, lim, x)
                        + (x * c.theta[g] if c.tilted else 0.0))
        for j in range(c.n_cons):
            part[j] -= x * c.cons[k * c.n_cons + j]
        if c.overflow:
            return


cdef void rb_point(Chain *c) noexcept nogil:
    """Moments of a point mass at the current T (a move that could not change y)."""
    cdef int64_t j, l
    for j in range(c.q):
        c.dev[j] = <double> (c.T[j] - c.ref[j])
    for j in range(c.q):
        c.rb[j] = c.dev[j]
        for l in range(c.q):
            c.rb[c.q + j * c.q + l] = c.dev[j] * c.dev[l]


cdef void rb_fiber(Chain *c, int64_t n, double total) noexcept nogil:
    """Moments of T - ref over the block's fiber, whose unnormalised weights are in fiber_lw."""
    cdef int64_t i, j, k, l, g
    cdef double wgt
    cdef int64_t q = c.q
    for j in range(q + q * q):
        c.rb[j] = 0.0
    for i in range(c.n_fiber):
        wgt = c.fiber_lw[i] / total
        for j in range(q):
            c.dev[j] = <double> (c.T[j] - c.ref[j])
        for k in range(n):
            g = c.block[k]
            if c.fiber[i * n + k] != c.rec[g * c.stride + 1]:
                for j in range(q):
                    c.dev[j] += <double> ((c.fiber[i * n + k] - c.rec[g * c.stride + 1])
                                          * c.rec[g * c.stride + 3 + c.p + j])
        for j in range(q):
            c.rb[j] += wgt * c.dev[j]
            for l in range(q):
                c.rb[q + j * q + l] += wgt * c.dev[j] * c.dev[l]


cdef bint in_block(const Chain *c, int64_t n, int64_t g) noexcept nogil:
    cdef int64_t i
    for i in range(n):
        if c.block[i] == g:
            return True
    return False


cdef int64_t pick_informative(const Chain *c, bitgen_t *bg) noexcept nogil:
    """An informative stratum, chosen with probability proportional to its number of groups
    (binary search of a random group among the informative strata's cumulative sizes)."""
    cdef int64_t u = draw_bounded(bg, <uint32_t> c.inf_cum[c.n_inf])
    cdef int64_t lo = 0, hi = c.n_inf - 1, mid
    while lo < hi:
        mid = (lo + hi) // 2
        if c.inf_cum[mid + 1] <= u:
            lo = mid + 1
        else:
            hi = mid
    return c.inf[lo]


cdef int64_t anchor_group(const Chain *c, bitgen_t *bg, int64_t h) noexcept nogil:
    """The group of a uniformly random anchor trial of stratum h: each group with probability
    a_g / A_h, a_g its trials of the anchor outcome (events, or non-events when those are rarer)
    in the current y and A_h = sum of a_g over the stratum (fixed)."""
    cdef int64_t u = draw_bounded(bg, <uint32_t> c.anchor_total[h])
    cdef int64_t last = c.start[h] + c.size[h] - 1
    cdef int64_t g = fen_search(c, fen_prefix(c, c.start[h]) + u)
    return g if g < last else last


cdef int64_t fill_from(Chain *c, bitgen_t *bg, int64_t first, int64_t count, int64_t k,
                       int64_t n0, int64_t anchor_h) noexcept nogil:
    """Put k distinct groups of first..first+count-1 (all of them if count <= k) into the block
    after its first n0 entries; returns how many were put. With ``anchor_h >= 0`` the first group
    is that of a random anchor trial of stratum anchor_h (`anchor_group`), the others uniform.

    Why an anchor keeps the move reversible although it depends on y: the block part B is then
    chosen with probability sum_{g in B} a_g(y) / (A_h C(count - 1, k - 1)), and sum_{g in B}
    a_g(y) is the block's count of the anchor outcome in stratum h, which the Gibbs redraw keeps
    fixed (stratum counts of the block are among its constraints). So every y' the move can reach
    from y chooses the same block with the same probability, and the Gibbs move over the block's
    fiber is reversible as with a selection that ignores y. The anchor puts a trial that can
    change into the block: with a few events in a stratum of many groups, uniformly chosen groups
    often hold none, and then the redraw cannot move any event of that stratum."""
    cdef int64_t i = 0, g
    if count <= k:
        for i in range(count):
            c.block[n0 + i] = first + i
        return count
    if anchor_h >= 0:
        c.block[n0] = anchor_group(c, bg, anchor_h)
        i = 1
    while i < k:
        g = first + draw_bounded(bg, <uint32_t> count)
        if not in_block(c, n0 + i, g):
            c.block[n0 + i] = g
            i += 1
    return k


cdef int64_t choose_block(Chain *c, bitgen_t *bg, int64_t r, bint *cross) noexcept nogil:
    """Fill c.block with the groups of the next move; returns their number.

    One draw in 4 picks the kind: the first `cross_quarters` values take the block from
    `n_cross` distinct informative strata (size-proportional, by rejection), r / n_cross groups
    from each; the others alternate between one stratum and all groups. None of these choices
    depends on y, except the anchors (see `fill_from`)."""
    cdef int64_t kind = draw_bounded(bg, 4)
    cdef int64_t h, i, j, n, k, n_s, tries
    cdef int64_t chosen[8]
    cdef bint dup
    cross[0] = False
    if kind < c.cross_quarters and c.n_inf >= 2:
        cross[0] = True
        n_s = c.n_cross if c.n_cross < c.n_inf else c.n_inf
        i = 0
        tries = 0
        while i < n_s:
            h = pick_informative(c, bg)
            dup = False
            for j in range(i):
                if chosen[j] == h:
                    dup = True
            tries += 1
            if not dup:
                chosen[i] = h
                i += 1
            elif tries > 64 * n_s:
                n_s = i             # a few strata hold nearly all groups: take what was found
        n = 0
        for i in range(n_s):
            h = chosen[i]
            k = (r - n) // (n_s - i)
            n += fill_from(c, bg, c.start[h], c.size[h], k, n,
                           h if c.anchored else -1)
        return n
    if kind % 2 == 0:
        if c.anchored and c.n_inf >= 1:
            h = pick_informative(c, bg)
            return fill_from(c, bg, c.start[h], c.size[h], r, 0, h)
        # A random group's stratum (so strata are chosen in proportion to their size).
        h = c.rec[draw_bounded(bg, <uint32_t> c.K) * c.stride + 2]
        return fill_from(c, bg, c.start[h], c.size[h], r, 0, -1)
    return fill_from(c, bg, 0, c.K, r, 0, -1)


cdef int block_move(Chain *c, bitgen_t *bg, int64_t r, bint *cross) noexcept nogil:
    """Redraw a random block from its exact conditional distribution. Returns 1 if y changed,
    0 if it did not (a single-point fiber, or the redraw gave the block back), -1 if the fiber
    was too large. `cross` is set when the block came from several strata."""
    cdef int64_t n, h, g, i, j, k, s, pick, v, lo, hi
    cdef int64_t n_strata_in = 0
    cdef int64_t strata_in[32]
    cdef double top, total, u, acc
    cdef int res
    if c.want_rb:
        rb_point(c)
    n = choose_block(c, bg, r, cross)
    if n < 2:
        return 0
    c.r = n
    # Constraints: nuisance columns, then one count per stratum present (when strata are fixed).
    if c.fixed:
        for i in range(n):
            h = c.rec[c.block[i] * c.stride + 2]
            s = -1
            for j in range(n_strata_in):
                if strata_in[j] == h:
                    s = j
            if s < 0:
                strata_in[n_strata_in] = h
                n_strata_in += 1
    c.n_cons = c.p + n_strata_in
    for i in range(n):
        g = c.block[i]
        for j in range(c.p):
            c.cons[i * c.n_cons + j] = c.rec[g * c.stride + 3 + j]
        for j in range(n_strata_in):
            c.cons[i * c.n_cons + c.p + j] = 1 if c.rec[g * c.stride + 2] == strata_in[j] else 0
    for j in range(c.n_cons):
        c.target[j] = 0
        c.partial[j] = 0
        c.rem_lo[n * c.n_cons + j] = 0
        c.rem_hi[n * c.n_cons + j] = 0
        for i in range(n):
            c.target[j] += c.cons[i * c.n_cons + j] * c.rec[c.block[i] * c.stride + 1]
    for i in range(n - 1, -1, -1):
        g = c.block[i]
        for j in range(c.n_cons):
            v = c.cons[i * c.n_cons + j] * c.rec[g * c.stride]
            lo = v if v < 0 else 0
            hi = v if v > 0 else 0
            c.rem_lo[i * c.n_cons + j] = c.rem_lo[(i + 1) * c.n_cons + j] + lo
            c.rem_hi[i * c.n_cons + j] = c.rem_hi[(i + 1) * c.n_cons + j] + hi
    c.n_fiber = 0
    c.visits = 0
    c.overflow = False
    enumerate_block(c, 0, 0.0)
    if c.overflow:
        return -1
    if c.n_fiber <= 1:
        return 0
    top = -INFINITY
    for i in range(c.n_fiber):
        if c.fiber_lw[i] > top:
            top = c.fiber_lw[i]
    total = 0.0
    for i in range(c.n_fiber):
        c.fiber_lw[i] = exp(c.fiber_lw[i] - top)
        total += c.fiber_lw[i]
    if c.want_rb:
        rb_fiber(c, n, total)
    u = draw_uniform(bg) * total
    acc = 0.0
    pick = c.n_fiber - 1
    for i in range(c.n_fiber):
        acc += c.fiber_lw[i]
        if u < acc:
            pick = i
            break
    res = 0
    for i in range(n):
        g = c.block[i]
        v = c.fiber[pick * n + i] - c.rec[g * c.stride + 1]
        if v != 0:
            change_y(c, g, v)
            res = 1
    return res


def run_chain(object bit_generator,
              int64_t[::1] y,
              const int64_t[::1] m,
              const int64_t[:, ::1] z,
              const int64_t[:, ::1] w,
              const int64_t[::1] stratum,
              const int64_t[::1] start,
              const int64_t[::1] size,
              const double[::1] theta,
              const double[::1] log_fact,
              bint fixed,
              int64_t block_size,
              int64_t burn,
              int64_t thin,
              int64_t[:, ::1] out,
              int64_t[::1] counters,
              int64_t cross_quarters=2,
              int64_t n_cross=2,
              bint anchored=True,
              double[:, ::1] moments=None,
              const int64_t[::1] ref=None):
    """Run one block-move chain: `burn` moves, then `out.shape[0]` records of T, one every
    `thin` moves.

    `y` (the state, in stage order) is updated in place, so a chain can be continued exactly.
    `counters` receives [moves, moves that changed y, moves skipped because a block's fiber was
    too large] and, if it has 5 entries, [cross-strata moves, cross-strata moves that changed y].
    With fixed strata, `cross_quarters` moves in 4 take the block from `n_cross` (2 to 8)
    distinct strata, and `anchored` starts each stratum's part of a block at a random trial of
    its rarer outcome (see `fill_from`); ``cross_quarters=0, anchored=False`` gives the earlier
    kernel's moves (half within one stratum, half from anywhere).

    `moments` (optional, ``out.shape[0]`` x (q + q * q), with `ref`, q values on T's scale)
    receives per record the mean over its `thin` moves of the Rao-Blackwellized moments
    E[T - ref | y outside the block] and E[(T - ref)(T - ref)' | y outside the block]: the
    moments of the fiber each move redrew its block from (a point mass at T for a move that could
    not change y). Since a move leaves the target invariant and redraws the block from exactly
    that fiber distribution, each has the target's expectation of T - ref (of its square), with
    less variance than T itself, and every move counts, not only the recorded ones (Gelfand &
    Smith 1990; Liu, Wong & Kong 1994). All arrays are validated by the caller.
    """
    cdef bitgen_t *bg = _bitgen(bit_generator)
    cdef Chain c
    cdef int64_t K = m.shape[0]
    cdef int64_t H = start.shape[0]
    cdef int64_t q = z.shape[1]
    cdef int64_t n_rec = out.shape[0]
    cdef int64_t i, h, g, rec, step, res
    cdef int64_t r = block_size if block_size < C_MAX_BLOCK else C_MAX_BLOCK
    cdef int64_t n_cons_max = w.shape[1] + r
    cdef int64_t[::1] T = np.zeros(q, dtype=np.int64)
    cdef int64_t[::1] block = np.zeros(C_MAX_BLOCK, dtype=np.int64)
    cdef int64_t[::1] cons = np.zeros(C_MAX_BLOCK * n_cons_max, dtype=np.int64)
    cdef int64_t[::1] target = np.zeros(n_cons_max, dtype=np.int64)
    cdef int64_t[::1] partial = np.zeros(n_cons_max, dtype=np.int64)
    cdef int64_t[::1] rem_lo = np.zeros((C_MAX_BLOCK + 1) * n_cons_max, dtype=np.int64)
    cdef int64_t[::1] rem_hi = np.zeros((C_MAX_BLOCK + 1) * n_cons_max, dtype=np.int64)
    cdef int64_t[::1] xbuf = np.zeros(C_MAX_BLOCK, dtype=np.int64)
    cdef int64_t[::1] fiber = np.zeros(C_MAX_FIBER * C_MAX_BLOCK, dtype=np.int64)
    cdef double[::1] fiber_lw = np.zeros(C_MAX_FIBER)

    cdef int64_t p = w.shape[1]
    cdef int64_t stride = 3 + p + q
    cdef int64_t[:, ::1] records = np.empty((K, stride), dtype=np.int64)
    for g in range(K):
        records[g, 0] = m[g]
        records[g, 1] = y[g]
        records[g, 2] = stratum[g]
        for i in range(p):
            records[g, 3 + i] = w[g, i]
        for i in range(q):
            records[g, 3 + p + i] = z[g, i]
    c.K = K
    c.p = p
    c.q = q
    c.stride = stride
    c.rec = &records[0, 0]
    c.start = &start[0]
    c.size = &size[0]
    c.theta = &theta[0]
    c.tilted = False
    for g in range(K):
        if theta[g] != 0.0:
            c.tilted = True
    c.log_fact = &log_fact[0]
    c.fixed = fixed
    c.T = &T[0]
    c.r = r
    c.block = &block[0]
    c.cons = &cons[0]
    c.target = &target[0]
    c.partial = &partial[0]
    c.rem_lo = &rem_lo[0]
    c.rem_hi = &rem_hi[0]
    c.x = &xbuf[0]
    c.fiber = &fiber[0]
    c.fiber_lw = &fiber_lw[0]

    # Informative strata and anchor counts, from the starting y: with fixed strata both are
    # invariants of the chain.
    cdef int64_t[::1] events_h = np.zeros(H, dtype=np.int64)
    cdef int64_t[::1] trials_h = np.zeros(H, dtype=np.int64)
    cdef int64_t[::1] anchor_total = np.zeros(H, dtype=np.int64)
    cdef int64_t[::1] anchor_events = np.zeros(H, dtype=np.int64)
    cdef int64_t[::1] inf = np.zeros(H + 1, dtype=np.int64)
    cdef int64_t[::1] inf_cum = np.zeros(H + 2, dtype=np.int64)
    cdef int64_t n_inf = 0
    for g in range(K):
        events_h[stratum[g]] += y[g]
        trials_h[stratum[g]] += m[g]
    for h in range(H):
        anchor_events[h] = 1 if 2 * events_h[h] <= trials_h[h] else 0
        anchor_total[h] = events_h[h] if anchor_events[h] else trials_h[h] - events_h[h]
        if fixed and size[h] >= 2 and 0 < events_h[h] < trials_h[h]:
            inf[n_inf] = h
            inf_cum[n_inf + 1] = inf_cum[n_inf] + size[h]
            n_inf += 1
    if not 2 <= n_cross <= 8:
        raise ValueError("mcexact: n_cross must be from 2 to 8")
    c.n_inf = n_inf
    c.inf = &inf[0]
    c.inf_cum = &inf_cum[0]
    c.anchor_total = &anchor_total[0]
    c.anchor_events = &anchor_events[0]
    c.cross_quarters = cross_quarters if fixed else 0
    c.n_cross = n_cross
    c.anchored = anchored and fixed
    cdef int64_t[::1] fen = np.zeros(K + 1, dtype=np.int64)
    cdef int64_t a_g, up
    c.fen = &fen[0]
    c.fen_top = 1
    while c.fen_top * 2 <= K:
        c.fen_top *= 2
    if c.anchored:
        # Linear-time build: each node passes its sum on to its parent.
        for g in range(K):
            a_g = y[g] if anchor_events[stratum[g]] else m[g] - y[g]
            fen[g + 1] += a_g
            up = (g + 1) + ((g + 1) & (-(g + 1)))
            if up <= K:
                fen[up] += fen[g + 1]
    cdef int64_t n_mom = q + q * q
    cdef double[::1] rb = np.zeros(n_mom)
    cdef double[::1] acc_rb = np.zeros(n_mom)
    cdef double[::1] dev = np.zeros(q if q > 0 else 1)
    c.want_rb = moments is not None
    if c.want_rb:
        if ref is None or ref.shape[0] != q or moments.shape[0] != n_rec \
                or moments.shape[1] != n_mom:
            raise ValueError("mcexact: moments must be n_records x (q + q*q), with q ref values")
        c.ref = &ref[0]
    c.rb = &rb[0]
    c.dev = &dev[0]
    cdef bint cross = False
    cdef bint extra = counters.shape[0] >= 5
    cdef int64_t n_cross_moves = 0, cross_changed = 0

    for g in range(K):
        for i in range(q):
            T[i] += y[g] * z[g, i]

    cdef int64_t countdown = burn + thin, moves = 0, changed = 0, skipped = 0
    with bit_generator.lock, nogil:
        rec = 0
        while rec < n_rec:
            res = block_move(&c, bg, r, &cross)
            moves += 1
            if res == 1:
                changed += 1
            elif res == -1:
                skipped += 1
            if cross:
                n_cross_moves += 1
                cross_changed += res == 1
            if c.want_rb and countdown <= thin:
                for i in range(n_mom):
                    acc_rb[i] += rb[i]
            countdown -= 1
            if countdown == 0:
                for i in range(q):
                    out[rec, i] = T[i]
                if c.want_rb:
                    for i in range(n_mom):
                        moments[rec, i] = acc_rb[i] / thin
                        acc_rb[i] = 0.0
                rec += 1
                countdown = thin
        counters[0] += moves
        counters[1] += changed
        counters[2] += skipped
        if extra:
            counters[3] += n_cross_moves
            counters[4] += cross_changed
    for g in range(K):
        y[g] = records[g, 1]


def bounded_draws(object bit_generator, uint32_t bound, int64_t n):
    """Sum of `n` bounded draws in a nogil loop: the unit of cost for the sampler benchmarks."""
    cdef bitgen_t *bg = _bitgen(bit_generator)
    cdef int64_t i
    cdef uint64_t total = 0
    with bit_generator.lock, nogil:
        for i in range(n):
            total += draw_bounded(bg, bound)
    return total


def run_unit_swaps(object bit_generator,
                   int32_t[::1] ev_group,
                   int64_t[:, ::1] ev_z,
                   int32_t[::1] non_group,
                   int64_t[:, ::1] non_z,
                   const int64_t[::1] ev_start,
                   const int64_t[::1] ev_count,
                   const int64_t[::1] non_start,
                   const int64_t[::1] non_count,
                   const int64_t[::1] informative,
                   const double[::1] theta,
                   bint tilted,
                   int64_t[::1] T,
                   int64_t burn,
                   int64_t thin,
                   int64_t[:, ::1] out,
                   int64_t[::1] counters):
    """Swap chain over single trials ("units") for designs whose nuisance is the intercept and/or
    strata: each stratum keeps the list of its event units and of its non-event units (with their
    interest covariates inline), and a move exchanges a random event unit with a random non-event
    unit of a random informative stratum.

    Under the null every assignment of a stratum's events to its units is equally likely, which is
    the conditional distribution given the stratum totals (a group of m identical rows with y events
    stands for C(m, y) assignments); the proposal is symmetric and the lists keep their sizes, so
    the move is accepted with probability min(1, exp(theta_in - theta_out)): always, untilted.
    A swap of two units of the same group changes nothing and is counted as not changing y.
    Lists, `T` and the generator are updated in place, so a chain continues exactly.
    """
    cdef bitgen_t *bg = _bitgen(bit_generator)
    cdef int64_t n_rec = out.shape[0]
    cdef Py_ssize_t q = T.shape[0]
    cdef int64_t n_inf = informative.shape[0]
    cdef int64_t h, a, b, gi, gj, rec = 0, countdown = burn + thin
    cdef int64_t moves = 0, changed = 0
    cdef int64_t zz
    cdef int64_t t_one = T[0] if q == 1 else 0
    cdef uint32_t ua, ub
    cdef Py_ssize_t j
    cdef double ratio
    if n_inf == 0:
        for rec in range(n_rec):
            for j in range(q):
                out[rec, j] = T[j]
        counters[0] += burn + thin * n_rec
        return
    with bit_generator.lock, nogil:
        while rec < n_rec:
            h = informative[0] if n_inf == 1 else informative[draw_bounded(bg, <uint32_t> n_inf)]
            draw_two_bounded(bg, <uint32_t> ev_count[h], <uint32_t> non_count[h], &ua, &ub)
            a = ev_start[h] + ua
            b = non_start[h] + ub
            moves += 1
            gi = ev_group[a]
            gj = non_group[b]
            if gi != gj:
                if tilted:
                    ratio = exp(theta[gj] - theta[gi])
                    if ratio < 1.0 and draw_uniform(bg) >= ratio:
                        gj = -1
                if gj >= 0:
                    ev_group[a] = <int32_t> gj
                    non_group[b] = <int32_t> gi
                    if q == 1:
                        zz = non_z[b, 0]
                        t_one += zz - ev_z[a, 0]
                        non_z[b, 0] = ev_z[a, 0]
                        ev_z[a, 0] = zz
                    else:
                        for j in range(q):
                            zz = non_z[b, j]
                            T[j] += zz - ev_z[a, j]
                            non_z[b, j] = ev_z[a, j]
                            ev_z[a, j] = zz
                    changed += 1
            countdown -= 1
            if countdown == 0:
                if q == 1:
                    out[rec, 0] = t_one
                else:
                    for j in range(q):
                        out[rec, j] = T[j]
                rec += 1
                countdown = thin
        if q == 1:
            T[0] = t_one
        counters[0] += moves
        counters[1] += changed
