# cython: language_level=3
"""Random draws from numpy bit generators, for kernels that run without the GIL.

The `bitgen_t` pointer comes from a numpy BitGenerator's capsule; callers hold the generator's
lock while drawing. Only the bit generator's function pointers are used, so no numpy library beyond
its headers is needed at link time.
"""

from libc.stdint cimport uint32_t, uint64_t
from numpy.random cimport bitgen_t


cdef inline uint32_t draw_bounded(bitgen_t *bg, uint32_t n) noexcept nogil:
    """Uniform integer in [0, n) for 0 < n < 2**32, without bias.

    Lemire's multiply-and-shift method (Lemire 2019, "Fast random integer generation in an
    interval", ACM TOMACS 29): one 32-bit draw and a multiplication; a division only in the rare
    rejection branch.
    """
    cdef uint64_t m = <uint64_t> bg.next_uint32(bg.state) * n
    cdef uint32_t low = <uint32_t> m
    cdef uint32_t threshold
    if low < n:
        threshold = (<uint32_t> (-n)) % n
        while low < threshold:
            m = <uint64_t> bg.next_uint32(bg.state) * n
            low = <uint32_t> m
    return <uint32_t> (m >> 32)


cdef inline double draw_uniform(bitgen_t *bg) noexcept nogil:
    """Uniform double in [0, 1)."""
    return bg.next_double(bg.state)


cdef inline void draw_two_bounded(bitgen_t *bg, uint32_t n1, uint32_t n2, uint32_t *out1,
                                  uint32_t *out2) noexcept nogil:
    """Two independent uniform integers in [0, n1) and [0, n2) from the two halves of one 64-bit
    draw (Lemire's method on each half; a rejected half is redrawn from 32-bit draws)."""
    cdef uint64_t x = bg.next_uint64(bg.state)
    cdef uint64_t m1 = (x & 0xFFFFFFFFULL) * n1
    cdef uint64_t m2 = (x >> 32) * n2
    cdef uint32_t threshold
    if <uint32_t> m1 < n1:
        threshold = (<uint32_t> (-n1)) % n1
        while <uint32_t> m1 < threshold:
            m1 = <uint64_t> bg.next_uint32(bg.state) * n1
    if <uint32_t> m2 < n2:
        threshold = (<uint32_t> (-n2)) % n2
        while <uint32_t> m2 < threshold:
            m2 = <uint64_t> bg.next_uint32(bg.state) * n2
    out1[0] = <uint32_t> (m1 >> 32)
    out2[0] = <uint32_t> (m2 >> 32)
