# cython: language_level=3, boundscheck=False, wraparound=False, cdivision=True, initializedcheck=False
"""Stage kernels of the network algorithm for exact conditional logistic regression.

Design
------
The conditional distribution of T = Z'y given S = W'y (and the events per stratum) is built
stage by stage over collapsed binomial groups, after Hirji, Mehta & Patel (1987), in two steps:

1. The *nuisance network* tracks only the nuisance partial sums (c, u): c is the number of events
   so far in the current stratum, u the partial sums of the nuisance columns. `expand_nuisance_stage`
   grows it forward, deleting nodes that can no longer reach the observed S (per-column bounds on
   what the remaining stages can add, tightened by the number of events still to place in the
   stratum); at the last stage of a stratum c must equal the stratum's events and is reset to 0.
   `backward_stage` then sums the weighted completions of every node backwards (log B), which
   removes the nodes that cannot complete at all and gives each arc its transition
   probability C(m, y) B(successor) / B(node) -- the same probabilities a direct sampler draws from
   (Mehta, Patel & Senchaudhuri 2000).
2. The *full network* (`forward_full_stage`) carries the interest partial sums v on top of the
   nuisance node, merging nodes with equal (node, v). A node's value is the log of the probability,
   under the null, of the paths reaching it, so every stage sums to one: nothing overflows however
   many trials there are, and log-domain sums keep far tails that doubles would flush to zero.

Keys are mixed-radix packings of the partial sums into int64, chosen by the Python layer so that
they cannot overflow; adding y times a group's covariates to a packed key is one multiply-add.
The kernels trust their inputs (validated in Python), allocate with malloc, and report a budget
overrun or an allocation failure by a status code: the caller raises once the GIL is back.
"""

import numpy as np
cimport numpy as cnp
from libc.math cimport exp, log1p, INFINITY
from libc.stdint cimport int32_t, int64_t, uint8_t, INT64_MAX, INT64_MIN
from libc.stdlib cimport malloc, realloc, free
from libc.string cimport memcpy

from mcexact._hashmap cimport (HashMap, hashmap_init, hashmap_free, hashmap_get,
                               hashmap_get_or_insert)

cnp.import_array()

# Status codes returned to the Python layer.
cdef enum:
    ST_OK = 0
    ST_NODE_BUDGET = 1
    ST_ARC_BUDGET = 2
    ST_NO_MEMORY = 3

STATUS_OK = ST_OK
STATUS_NODE_BUDGET = ST_NODE_BUDGET
STATUS_ARC_BUDGET = ST_ARC_BUDGET
STATUS_NO_MEMORY = ST_NO_MEMORY


cdef struct Buffer:
    char *data
    int64_t size          # elements in use
    int64_t capacity      # elements allocated
    int64_t itemsize


cdef int buffer_init(Buffer *b, int64_t capacity, int64_t itemsize) noexcept nogil:
    if capacity < 16:
        capacity = 16
    b.data = <char *> malloc(capacity * itemsize)
    b.size = 0
    b.capacity = capacity
    b.itemsize = itemsize
    return 0 if b.data != NULL else -1


cdef int buffer_reserve(Buffer *b, int64_t extra) noexcept nogil:
    """Make room for `extra` more elements. Returns 0, or -1 when out of memory."""
    cdef int64_t cap = b.capacity
    cdef char *grown
    if b.size + extra <= cap:
        return 0
    while cap < b.size + extra:
        cap *= 2
    grown = <char *> realloc(b.data, cap * b.itemsize)
    if grown == NULL:
        return -1
    b.data = grown
    b.capacity = cap
    return 0


cdef object buffer_to_array(Buffer *b, object dtype, int64_t width):
    """Copy the buffer into a new numpy array of shape (size / width, width), or (size,) if width is 0."""
    cdef cnp.ndarray out
    if width == 0:
        out = np.empty(b.size, dtype=dtype)
    else:
        out = np.empty((b.size // width, width), dtype=dtype)
    if b.size > 0:
        memcpy(cnp.PyArray_DATA(out), b.data, b.size * b.itemsize)
    return out


cdef inline double log_add(double a, double b) noexcept nogil:
    """log(exp(a) + exp(b)) without overflow."""
    if a == -INFINITY:
        return b
    if b == -INFINITY:
        return a
    if a >= b:
        return a + log1p(exp(b - a))
    return b + log1p(exp(a - b))


cdef int _expand(const int64_t[:, ::1] comp, int64_t m, const int64_t[::1] w, bint fixed,
                 int64_t c_target, bint stratum_end, int64_t rem_trials, const int64_t[::1] s,
                 const int64_t[::1] later_lo, const int64_t[::1] later_hi,
                 const int64_t[::1] rem_lo, const int64_t[::1] rem_hi,
                 const int64_t[::1] unit_min, const int64_t[::1] unit_max,
                 const int64_t[::1] ustride, const int64_t[::1] ulo, int64_t cstride,
                 int64_t max_nodes, int64_t max_arcs, Buffer *next_comp, Buffer *succ_buf,
                 Buffer *y_buf, int64_t[::1] arc_ptr, int64_t *n_next_out) noexcept nogil:
    """Core of `expand_nuisance_stage`; buffers must be initialised by the caller."""
    cdef Py_ssize_t n_cur = comp.shape[0]
    cdef Py_ssize_t width = comp.shape[1]
    cdef Py_ssize_t p = width - 1
    cdef Py_ssize_t i, j
    cdef int64_t y, c_new, r, u_new, lo, hi, need, key, found, n_next = 0
    cdef int status = ST_OK
    cdef bint ok
    cdef HashMap table
    cdef int64_t *nc
    cdef int32_t *sb
    cdef int32_t *yb
    cdef int64_t new_comp[64]
    if width > 64:
        return ST_NO_MEMORY
    if hashmap_init(&table, n_cur) != 0:
        return ST_NO_MEMORY
    arc_ptr[0] = 0
    for i in range(n_cur):
        for y in range(m + 1):
            c_new = 0
            r = 0
            if fixed:
                c_new = comp[i, 0] + y
                if c_new > c_target:
                    break
                r = c_target - c_new
                if stratum_end:
                    if r != 0:
                        continue
                elif r > rem_trials:
                    continue
            ok = True
            key = 0
            for j in range(p):
                u_new = comp[i, j + 1] + y * w[j]
                need = s[j] - u_new
                if fixed:
                    lo = later_lo[j] + (rem_lo[j] if rem_lo[j] > r * unit_min[j] else r * unit_min[j])
                    hi = later_hi[j] + (rem_hi[j] if rem_hi[j] < r * unit_max[j] else r * unit_max[j])
                else:
                    lo = later_lo[j] + rem_lo[j]
                    hi = later_hi[j] + rem_hi[j]
                if need < lo or need > hi:
                    ok = False
                    break
                new_comp[j + 1] = u_new
                key += (u_new - ulo[j]) * ustride[j]
            if not ok:
                continue
            if stratum_end:
                c_new = 0
            new_comp[0] = c_new
            key += c_new * cstride
            found = hashmap_get_or_insert(&table, key, n_next)
            if found == -2:
                status = ST_NO_MEMORY
                break
            if found == -1:
                found = n_next
                n_next += 1
                if n_next > max_nodes:
                    status = ST_NODE_BUDGET
                    break
                if buffer_reserve(next_comp, width) != 0:
                    status = ST_NO_MEMORY
                    break
                nc = (<int64_t *> next_comp.data) + next_comp.size
                for j in range(width):
                    nc[j] = new_comp[j]
                next_comp.size += width
            if succ_buf.size >= max_arcs:
                status = ST_ARC_BUDGET
                break
            if buffer_reserve(succ_buf, 1) != 0 or buffer_reserve(y_buf, 1) != 0:
                status = ST_NO_MEMORY
                break
            sb = <int32_t *> succ_buf.data
            yb = <int32_t *> y_buf.data
            sb[succ_buf.size] = <int32_t> found
            yb[y_buf.size] = <int32_t> y
            succ_buf.size += 1
            y_buf.size += 1
        if status != ST_OK:
            break
        arc_ptr[i + 1] = succ_buf.size
    hashmap_free(&table)
    n_next_out[0] = n_next
    return status


def expand_nuisance_stage(const int64_t[:, ::1] comp,
                          int64_t m,
                          const int64_t[::1] w,
                          bint fixed,
                          int64_t c_target,
                          bint stratum_end,
                          int64_t rem_trials,
                          const int64_t[::1] s,
                          const int64_t[::1] later_lo,
                          const int64_t[::1] later_hi,
                          const int64_t[::1] rem_lo,
                          const int64_t[::1] rem_hi,
                          const int64_t[::1] unit_min,
                          const int64_t[::1] unit_max,
                          const int64_t[::1] ustride,
                          const int64_t[::1] ulo,
                          int64_t cstride,
                          int64_t max_nodes,
                          int64_t max_arcs):
    """Grow the nuisance network by one stage (one binomial group of `m` trials).

    Parameters
    ----------
    comp : (N, 1 + p) int64
        Components of the current nodes: events so far in the stratum, then the nuisance partial sums.
    m, w : trials and nuisance covariates of the group.
    fixed : whether the stratum's events are conditioned on (then `c_target` is that number).
    stratum_end : whether this group is the last of its stratum.
    rem_trials : trials of the stratum's groups after this one.
    s : observed nuisance statistics.
    later_lo, later_hi : least and greatest nuisance sums the later strata can add, given their events.
    rem_lo, rem_hi : least and greatest sums the stratum's later groups can add, whatever their events.
    unit_min, unit_max : least and greatest covariate value among the stratum's later groups.
    ustride, ulo, cstride : packing of a node's components into its key.
    max_nodes, max_arcs : budgets for the new stage.

    Returns
    -------
    status : int
    next_comp : (M, 1 + p) int64
    arc_ptr : (N + 1,) int64, arcs of node i are arc_ptr[i]:arc_ptr[i + 1]
    arc_succ, arc_y : (A,) int32, successor index and events of each arc
    """
    cdef Buffer next_comp, succ_buf, y_buf
    cdef int64_t n_next = 0
    cdef int status
    cdef Py_ssize_t width = comp.shape[1]
    cdef int64_t[::1] arc_ptr = np.zeros(comp.shape[0] + 1, dtype=np.int64)
    if (buffer_init(&next_comp, comp.shape[0] * width, sizeof(int64_t)) != 0
            or buffer_init(&succ_buf, comp.shape[0], sizeof(int32_t)) != 0
            or buffer_init(&y_buf, comp.shape[0], sizeof(int32_t)) != 0):
        status = ST_NO_MEMORY
    else:
        with nogil:
            status = _expand(comp, m, w, fixed, c_target, stratum_end, rem_trials, s, later_lo,
                             later_hi, rem_lo, rem_hi, unit_min, unit_max, ustride, ulo, cstride,
                             max_nodes, max_arcs, &next_comp, &succ_buf, &y_buf, arc_ptr, &n_next)
    if status == ST_OK:
        out = (status, buffer_to_array(&next_comp, np.int64, width), np.asarray(arc_ptr),
               buffer_to_array(&succ_buf, np.int32, 0), buffer_to_array(&y_buf, np.int32, 0))
    else:
        out = (status, n_next, None, succ_buf.size, None)
    free(next_comp.data)
    free(succ_buf.data)
    free(y_buf.data)
    return out


def build_nuisance(const int64_t[::1] trials,
                   const int64_t[:, ::1] nuisance,
                   bint fixed,
                   const int64_t[::1] c_target,
                   const uint8_t[::1] stratum_end,
                   const int64_t[::1] rem_trials,
                   const int64_t[::1] s,
                   const int64_t[:, ::1] later_lo,
                   const int64_t[:, ::1] later_hi,
                   const int64_t[:, ::1] rem_lo,
                   const int64_t[:, ::1] rem_hi,
                   const int64_t[:, ::1] unit_min,
                   const int64_t[:, ::1] unit_max,
                   const int64_t[::1] ustride,
                   const int64_t[::1] ulo,
                   list log_binom,
                   int64_t max_nodes,
                   int64_t max_arcs):
    """The whole nuisance network: forward growth (`expand_nuisance_stage` at every stage), then
    the backward pass that sums completion weights and removes nodes that cannot complete.

    Returns
    -------
    (status, stage, reached)
        status ST_OK, or the budget/memory code with the stage reached and the count reached.
    arc_ptr, arc_succ, arc_y, arc_logp, log_b : lists over stages (see exact.NuisanceNetwork)
    stage_nodes : list of int
    """
    cdef Py_ssize_t K = trials.shape[0]
    cdef Py_ssize_t p = nuisance.shape[1]
    cdef Py_ssize_t k, i, a, n_cur, n_alive, n_kept
    cdef int status = ST_OK
    cdef int64_t n_next = 0, total = 1, total_arcs = 0
    cdef Buffer next_comp, succ_buf, y_buf
    cdef int64_t[:, ::1] comp = np.zeros((1, 1 + p), dtype=np.int64)
    cdef int64_t[::1] arc_ptr
    cdef const int64_t[::1] fptr
    cdef const int32_t[::1] fsucc
    cdef const int32_t[::1] fy
    cdef const double[::1] lbin
    cdef int64_t[::1] alive_next
    cdef double[::1] lb_next
    cdef int64_t[::1] alive_map
    cdef double[::1] lb
    cdef int64_t[::1] ptr_new
    cdef int32_t[::1] succ_new
    cdef int32_t[::1] y_new
    cdef double[::1] logp_new
    cdef double[::1] lb_alive
    cdef double acc, term
    cdef int64_t sn
    fwd_ptr, fwd_succ, fwd_y = [], [], []
    counts = [1]
    for k in range(K):
        if (buffer_init(&next_comp, comp.shape[0] * (1 + p), sizeof(int64_t)) != 0
                or buffer_init(&succ_buf, comp.shape[0], sizeof(int32_t)) != 0
                or buffer_init(&y_buf, comp.shape[0], sizeof(int32_t)) != 0):
            free(next_comp.data)
            free(succ_buf.data)
            free(y_buf.data)
            return (ST_NO_MEMORY, k + 1, total), None, None, None, None, None, None
        arc_ptr = np.zeros(comp.shape[0] + 1, dtype=np.int64)
        with nogil:
            status = _expand(comp, trials[k], nuisance[k], fixed, c_target[k],
                             stratum_end[k] != 0, rem_trials[k], s, later_lo[k], later_hi[k],
                             rem_lo[k], rem_hi[k], unit_min[k], unit_max[k], ustride, ulo, 1,
                             max_nodes - total, max_arcs - total_arcs, &next_comp, &succ_buf,
                             &y_buf, arc_ptr, &n_next)
        if status != ST_OK:
            reached = (total + n_next) if status == ST_NODE_BUDGET else (total_arcs + succ_buf.size)
            free(next_comp.data)
            free(succ_buf.data)
            free(y_buf.data)
            return (status, k + 1, reached), None, None, None, None, None, None
        comp = buffer_to_array(&next_comp, np.int64, 1 + p)
        fwd_ptr.append(np.asarray(arc_ptr))
        fwd_succ.append(buffer_to_array(&succ_buf, np.int32, 0))
        fwd_y.append(buffer_to_array(&y_buf, np.int32, 0))
        total += comp.shape[0]
        total_arcs += succ_buf.size
        counts.append(comp.shape[0])
        free(next_comp.data)
        free(succ_buf.data)
        free(y_buf.data)
    if comp.shape[0] != 1:
        raise AssertionError("mcexact internal error: the nuisance network did not close on S")

    # Backward: completion weights, dead nodes removed, stages renumbered.
    out_ptr, out_succ, out_y, out_logp, out_lb = [None] * K, [None] * K, [None] * K, [None] * K, [None] * (K + 1)
    stage_nodes = [0] * (K + 1)
    stage_nodes[K] = 1
    lb_next = np.zeros(1)
    alive_next = np.zeros(1, dtype=np.int64)
    out_lb[K] = np.asarray(lb_next)
    for k in range(K - 1, -1, -1):
        fptr = fwd_ptr[k]
        fsucc = fwd_succ[k]
        fy = fwd_y[k]
        lbin = log_binom[k]
        n_cur = fptr.shape[0] - 1
        lb = np.empty(n_cur)
        alive_map = np.empty(n_cur, dtype=np.int64)
        with nogil:
            n_alive = 0
            n_kept = 0
            for i in range(n_cur):
                acc = -INFINITY
                for a in range(fptr[i], fptr[i + 1]):
                    sn = alive_next[fsucc[a]]
                    if sn >= 0:
                        acc = log_add(acc, lbin[fy[a]] + lb_next[sn])
                        n_kept += 1
                lb[i] = acc
                if acc != -INFINITY:
                    alive_map[i] = n_alive
                    n_alive += 1
                else:
                    alive_map[i] = -1
        ptr_new = np.zeros(n_alive + 1, dtype=np.int64)
        succ_new = np.empty(n_kept, dtype=np.int32)
        y_new = np.empty(n_kept, dtype=np.int32)
        logp_new = np.empty(n_kept)
        lb_alive = np.empty(n_alive)
        with nogil:
            n_kept = 0
            for i in range(n_cur):
                if alive_map[i] < 0:
                    continue
                lb_alive[alive_map[i]] = lb[i]
                for a in range(fptr[i], fptr[i + 1]):
                    sn = alive_next[fsucc[a]]
                    if sn >= 0:
                        succ_new[n_kept] = <int32_t> sn
                        y_new[n_kept] = fy[a]
                        logp_new[n_kept] = lbin[fy[a]] + lb_next[sn] - lb[i]
                        n_kept += 1
                ptr_new[alive_map[i] + 1] = n_kept
        out_ptr[k] = np.asarray(ptr_new)
        out_succ[k] = np.asarray(succ_new)
        out_y[k] = np.asarray(y_new)
        out_logp[k] = np.asarray(logp_new)
        out_lb[k] = np.asarray(lb_alive)
        stage_nodes[k] = n_alive
        lb_next = lb_alive
        alive_next = alive_map
        fwd_ptr[k] = fwd_succ[k] = fwd_y[k] = None
    return (ST_OK, K, total), out_ptr, out_succ, out_y, out_logp, out_lb, stage_nodes


def backward_stage(const int64_t[::1] arc_ptr,
                   const int32_t[::1] arc_succ,
                   const int32_t[::1] arc_y,
                   const double[::1] log_b_next,
                   const double[::1] log_binom):
    """Log weighted completions of each node: log sum over arcs of C(m, y) B(successor).

    Successors with ``log_b_next == -inf`` are dead; a node all of whose arcs lead to dead nodes
    gets -inf itself.
    """
    cdef Py_ssize_t n = arc_ptr.shape[0] - 1
    cdef Py_ssize_t i
    cdef int64_t a
    cdef double acc, term
    cdef double[::1] log_b = np.empty(n, dtype=np.float64)
    with nogil:
        for i in range(n):
            acc = -INFINITY
            for a in range(arc_ptr[i], arc_ptr[i + 1]):
                term = log_b_next[arc_succ[a]]
                if term != -INFINITY:
                    acc = log_add(acc, log_binom[arc_y[a]] + term)
            log_b[i] = acc
    return np.asarray(log_b)


def forward_full_stage(const int64_t[::1] cur_node,
                       const int64_t[::1] cur_v,
                       const double[::1] cur_logp,
                       const int64_t[::1] arc_ptr,
                       const int32_t[::1] arc_succ,
                       const int32_t[::1] arc_y,
                       const double[::1] arc_logp,
                       int64_t z_step,
                       int64_t v_size,
                       int64_t max_nodes):
    """Advance the full network (nuisance node, packed interest sums v) by one stage.

    Each full node (node, v) with log path probability lp follows every arc (successor, y, log
    transition probability) of its nuisance node to (successor, v + y * z_step); nodes that meet
    are merged by adding their probabilities in the log domain.

    Returns
    -------
    status : int
    next_node, next_v : (M,) int64
    next_logp : (M,) float64
    """
    cdef Py_ssize_t n_cur = cur_node.shape[0]
    cdef Py_ssize_t i
    cdef int64_t a, node, succ, v_new, key, found, n_next = 0
    cdef double lp
    cdef int status = ST_OK
    cdef HashMap table
    cdef Buffer node_buf, v_buf, lp_buf
    cdef int64_t *nb
    cdef int64_t *vb
    cdef double *lb

    if (hashmap_init(&table, n_cur) != 0 or buffer_init(&node_buf, n_cur, sizeof(int64_t)) != 0
            or buffer_init(&v_buf, n_cur, sizeof(int64_t)) != 0
            or buffer_init(&lp_buf, n_cur, sizeof(double)) != 0):
        status = ST_NO_MEMORY
    else:
        with nogil:
            for i in range(n_cur):
                node = cur_node[i]
                for a in range(arc_ptr[node], arc_ptr[node + 1]):
                    succ = arc_succ[a]
                    v_new = cur_v[i] + arc_y[a] * z_step
                    lp = cur_logp[i] + arc_logp[a]
                    key = succ * v_size + v_new
                    found = hashmap_get_or_insert(&table, key, n_next)
                    if found == -2:
                        status = ST_NO_MEMORY
                        break
                    if found == -1:
                        if n_next >= max_nodes:
                            status = ST_NODE_BUDGET
                            break
                        if (buffer_reserve(&node_buf, 1) != 0 or buffer_reserve(&v_buf, 1) != 0
                                or buffer_reserve(&lp_buf, 1) != 0):
                            status = ST_NO_MEMORY
                            break
                        nb = <int64_t *> node_buf.data
                        vb = <int64_t *> v_buf.data
                        lb = <double *> lp_buf.data
                        nb[n_next] = succ
                        vb[n_next] = v_new
                        lb[n_next] = lp
                        n_next += 1
                        node_buf.size = n_next
                        v_buf.size = n_next
                        lp_buf.size = n_next
                    else:
                        lb = <double *> lp_buf.data
                        lb[found] = log_add(lb[found], lp)
                if status != ST_OK:
                    break
    hashmap_free(&table)
    if status == ST_OK:
        out = (status, buffer_to_array(&node_buf, np.int64, 0), buffer_to_array(&v_buf, np.int64, 0),
               buffer_to_array(&lp_buf, np.float64, 0))
    else:
        out = (status, n_next, None, None)
    free(node_buf.data)
    free(v_buf.data)
    free(lp_buf.data)
    return out


cdef void _minmax(const int64_t[:, ::1] cur_min, const int64_t[:, ::1] cur_max,
                  const int64_t[::1] arc_ptr, const int32_t[::1] arc_succ,
                  const int32_t[::1] arc_y, const int64_t[::1] z, int64_t[:, ::1] nmin,
                  int64_t[:, ::1] nmax) noexcept nogil:
    cdef Py_ssize_t n_cur = cur_min.shape[0]
    cdef Py_ssize_t q = cur_min.shape[1]
    cdef Py_ssize_t i, j
    cdef int64_t a, succ, lo, hi
    for i in range(nmin.shape[0]):
        for j in range(q):
            nmin[i, j] = INT64_MAX
            nmax[i, j] = INT64_MIN
    for i in range(n_cur):
        for a in range(arc_ptr[i], arc_ptr[i + 1]):
            succ = arc_succ[a]
            for j in range(q):
                lo = cur_min[i, j] + arc_y[a] * z[j]
                hi = cur_max[i, j] + arc_y[a] * z[j]
                if lo < nmin[succ, j]:
                    nmin[succ, j] = lo
                if hi > nmax[succ, j]:
                    nmax[succ, j] = hi


def minmax_stage(const int64_t[:, ::1] cur_min,
                 const int64_t[:, ::1] cur_max,
                 const int64_t[::1] arc_ptr,
                 const int32_t[::1] arc_succ,
                 const int32_t[::1] arc_y,
                 const int64_t[::1] z,
                 Py_ssize_t n_next):
    """Least and greatest interest partial sums over all paths reaching each next-stage node.

    Carried forward over the (pruned) nuisance network, this gives the exact range of every
    interest statistic given S, and bounds the size of the full network before it is built.
    """
    cdef int64_t[:, ::1] nmin = np.empty((n_next, cur_min.shape[1]), dtype=np.int64)
    cdef int64_t[:, ::1] nmax = np.empty((n_next, cur_min.shape[1]), dtype=np.int64)
    with nogil:
        _minmax(cur_min, cur_max, arc_ptr, arc_succ, arc_y, z, nmin, nmax)
    return np.asarray(nmin), np.asarray(nmax)


def interest_ranges_all(list arc_ptr, list arc_succ, list arc_y, const int64_t[:, ::1] z,
                        list stage_nodes):
    """`minmax_stage` over every stage: lists of per-node (least, greatest) interest sums, and
    the number of slots of each stage's boxes (the product of the ranges, summed over nodes)."""
    cdef Py_ssize_t K = z.shape[0]
    cdef Py_ssize_t q = z.shape[1]
    cdef Py_ssize_t k, i, j
    cdef int64_t[:, ::1] lo = np.zeros((1, q), dtype=np.int64)
    cdef int64_t[:, ::1] hi = np.zeros((1, q), dtype=np.int64)
    cdef int64_t[:, ::1] nlo
    cdef int64_t[:, ::1] nhi
    cdef double[::1] slots = np.zeros(K + 1)
    cdef double prod
    cdef const int64_t[::1] ap
    cdef const int32_t[::1] asu
    cdef const int32_t[::1] ay
    los, his = [np.asarray(lo)], [np.asarray(hi)]
    slots[0] = 1.0
    for k in range(K):
        nlo = np.empty((stage_nodes[k + 1], q), dtype=np.int64)
        nhi = np.empty((stage_nodes[k + 1], q), dtype=np.int64)
        ap, asu, ay = arc_ptr[k], arc_succ[k], arc_y[k]
        with nogil:
            _minmax(lo, hi, ap, asu, ay, z[k], nlo, nhi)
            for i in range(nlo.shape[0]):
                prod = 1.0
                for j in range(q):
                    prod *= <double> (nhi[i, j] - nlo[i, j] + 1)
                slots[k + 1] += prod
        lo, hi = nlo, nhi
        los.append(np.asarray(lo))
        his.append(np.asarray(hi))
    return los, his, np.asarray(slots)


cdef int _dense(const double[::1] cur_logp, const int64_t[::1] cur_offset,
                const int64_t[:, ::1] cur_vmin, const int64_t[:, ::1] cur_width,
                const int64_t[::1] next_offset, const int64_t[:, ::1] next_vmin,
                const int64_t[:, ::1] next_stride, const int64_t[::1] arc_ptr,
                const int32_t[::1] arc_succ, const int32_t[::1] arc_y,
                const double[::1] arc_logp, const int64_t[::1] z, double[::1] nxt) noexcept nogil:
    cdef Py_ssize_t n_cur = cur_offset.shape[0] - 1
    cdef Py_ssize_t q = z.shape[0]
    cdef Py_ssize_t i, j, t, n_slots
    cdef int64_t a, succ, base, idx, y
    cdef double lp, add
    cdef int64_t digit[64]
    if q > 64:
        return ST_NO_MEMORY
    for t in range(nxt.shape[0]):
        nxt[t] = -INFINITY
    for i in range(n_cur):
        n_slots = cur_offset[i + 1] - cur_offset[i]
        for a in range(arc_ptr[i], arc_ptr[i + 1]):
            succ = arc_succ[a]
            y = arc_y[a]
            add = arc_logp[a]
            base = next_offset[succ]
            for j in range(q):
                base += (cur_vmin[i, j] + y * z[j] - next_vmin[succ, j]) * next_stride[succ, j]
            if q == 1:
                for t in range(n_slots):
                    lp = cur_logp[cur_offset[i] + t]
                    if lp != -INFINITY:
                        nxt[base + t] = log_add(nxt[base + t], lp + add)
            else:
                # Odometer over the block's box: digit j runs over 0..width_j - 1.
                for j in range(q):
                    digit[j] = 0
                idx = base
                for t in range(n_slots):
                    lp = cur_logp[cur_offset[i] + t]
                    if lp != -INFINITY:
                        nxt[idx] = log_add(nxt[idx], lp + add)
                    j = 0
                    digit[0] += 1
                    idx += next_stride[succ, 0]
                    while j < q - 1 and digit[j] == cur_width[i, j]:
                        idx -= digit[j] * next_stride[succ, j]
                        digit[j] = 0
                        j += 1
                        digit[j] += 1
                        idx += next_stride[succ, j]
    return ST_OK


cdef void _box_layout(const int64_t[:, ::1] lo, const int64_t[:, ::1] hi, int64_t[:, ::1] width,
                      int64_t[:, ::1] stride, int64_t[::1] offset) noexcept nogil:
    """Widths, mixed-radix strides (first column fastest) and offsets of each node's box."""
    cdef Py_ssize_t i, j
    cdef int64_t size
    offset[0] = 0
    for i in range(lo.shape[0]):
        size = 1
        for j in range(lo.shape[1]):
            width[i, j] = hi[i, j] - lo[i, j] + 1
            stride[i, j] = size
            size *= width[i, j]
        offset[i + 1] = offset[i] + size


def forward_dense_stage(const double[::1] cur_logp,
                        const int64_t[::1] cur_offset,
                        const int64_t[:, ::1] cur_vmin,
                        const int64_t[:, ::1] cur_width,
                        const int64_t[::1] next_offset,
                        const int64_t[:, ::1] next_vmin,
                        const int64_t[:, ::1] next_stride,
                        const int64_t[::1] arc_ptr,
                        const int32_t[::1] arc_succ,
                        const int32_t[::1] arc_y,
                        const double[::1] arc_logp,
                        const int64_t[::1] z):
    """Advance the full network by one stage on direct-addressed blocks.

    Every nuisance node owns a block of slots, one per interest vector in the box between the least
    and greatest partial sums that reach it (``minmax_stage``); slot values are log path
    probabilities (-inf where no path arrives). Following an arc shifts a whole block by y * z into
    the successor's block, so the inner loop walks memory in order: no hashing.

    Returns
    -------
    next_logp : (next_offset[-1],) float64
    """
    cdef double[::1] nxt = np.empty(next_offset[next_offset.shape[0] - 1])
    with nogil:
        _dense(cur_logp, cur_offset, cur_vmin, cur_width, next_offset, next_vmin, next_stride,
               arc_ptr, arc_succ, arc_y, arc_logp, z, nxt)
    return np.asarray(nxt)


def full_dense(list los, list his, list arc_ptr, list arc_succ, list arc_y, list arc_logp,
               const int64_t[:, ::1] z):
    """The full network on dense blocks over every stage (`forward_dense_stage` at each).

    Returns
    -------
    log_p : (slots,) float64, the last stage's single block
    total, peak : int, live nodes (finite slots) in all stages and in the largest
    """
    cdef Py_ssize_t K = z.shape[0]
    cdef Py_ssize_t q = z.shape[1]
    cdef Py_ssize_t k, t
    cdef int64_t live, total = 1, peak = 1
    cdef double[::1] cur = np.zeros(1)
    cdef double[::1] nxt
    cdef int64_t[:, ::1] cur_lo = los[0]
    cdef int64_t[:, ::1] cur_width = np.ones((1, q), dtype=np.int64)
    cdef int64_t[::1] cur_offset = np.array([0, 1], dtype=np.int64)
    cdef int64_t[:, ::1] nlo
    cdef int64_t[:, ::1] nwidth
    cdef int64_t[:, ::1] nstride
    cdef int64_t[::1] noffset
    cdef const int64_t[:, ::1] nhi
    cdef const int64_t[::1] ap
    cdef const int32_t[::1] asu
    cdef const int32_t[::1] ay
    cdef const double[::1] alp
    for k in range(K):
        nlo = los[k + 1]
        nhi = his[k + 1]
        ap, asu, ay, alp = arc_ptr[k], arc_succ[k], arc_y[k], arc_logp[k]
        nwidth = np.empty_like(los[k + 1])
        nstride = np.empty_like(los[k + 1])
        noffset = np.empty(nlo.shape[0] + 1, dtype=np.int64)
        with nogil:
            _box_layout(nlo, nhi, nwidth, nstride, noffset)
        nxt = np.empty(noffset[nlo.shape[0]])
        with nogil:
            _dense(cur, cur_offset, cur_lo, cur_width, noffset, nlo, nstride, ap, asu, ay, alp,
                   z[k], nxt)
            live = 0
            for t in range(nxt.shape[0]):
                if nxt[t] != -INFINITY:
                    live += 1
        total += live
        if live > peak:
            peak = live
        cur, cur_lo, cur_width, cur_offset = nxt, nlo, nwidth, noffset
    return np.asarray(cur), total, peak
