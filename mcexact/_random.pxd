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
