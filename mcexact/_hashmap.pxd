# cython: language_level=3
"""Open-addressing hash map from non-negative int64 keys to int64 values.

Shared by the kernels: network nodes are identified by packed integer keys (mixed-radix
partial sums), and a stage's nodes are merged by looking their keys up here. Linear probing
on a power-of-two table; the table doubles when it is half full, so a probe sequence stays
short. Keys must be >= 0 (-1 marks an empty slot). Allocation failure is reported by a
return value, never by an exception, so every function can run without the GIL.
"""

from libc.stdint cimport int64_t, uint64_t
from libc.stdlib cimport malloc, free


cdef struct HashMap:
    int64_t *keys
    int64_t *vals
    int64_t capacity      # a power of two
    int64_t size


cdef inline uint64_t hash_key(int64_t key) noexcept nogil:
    # Finaliser of splitmix64 (Steele, Lea & Flood 2014): packed keys are highly regular,
    # so they need thorough mixing before they are reduced to a slot.
    cdef uint64_t x = <uint64_t> key
    x ^= x >> 30
    x *= 0xbf58476d1ce4e5b9ULL
    x ^= x >> 27
    x *= 0x94d049bb133111ebULL
    x ^= x >> 31
    return x


cdef inline int hashmap_init(HashMap *h, int64_t expected) noexcept nogil:
    """Allocate a table for about `expected` keys. Returns 0, or -1 when out of memory."""
    cdef int64_t cap = 16
    cdef int64_t i
    while cap < 2 * expected:
        cap <<= 1
    h.keys = <int64_t *> malloc(cap * sizeof(int64_t))
    h.vals = <int64_t *> malloc(cap * sizeof(int64_t))
    if h.keys == NULL or h.vals == NULL:
        free(h.keys)
        free(h.vals)
        h.keys = NULL
        h.vals = NULL
        return -1
    for i in range(cap):
        h.keys[i] = -1
    h.capacity = cap
    h.size = 0
    return 0


cdef inline void hashmap_free(HashMap *h) noexcept nogil:
    free(h.keys)
    free(h.vals)
    h.keys = NULL
    h.vals = NULL
    h.capacity = 0
    h.size = 0


cdef inline int64_t hashmap_get(const HashMap *h, int64_t key) noexcept nogil:
    """The value stored under `key`, or -1 when the key is absent."""
    cdef uint64_t mask = <uint64_t> (h.capacity - 1)
    cdef uint64_t slot = hash_key(key) & mask
    while True:
        if h.keys[slot] == key:
            return h.vals[slot]
        if h.keys[slot] == -1:
            return -1
        slot = (slot + 1) & mask


cdef inline int hashmap_grow(HashMap *h) noexcept nogil:
    cdef HashMap bigger
    cdef int64_t i
    cdef uint64_t mask, slot
    if hashmap_init(&bigger, h.capacity) != 0:
        return -1
    mask = <uint64_t> (bigger.capacity - 1)
    for i in range(h.capacity):
        if h.keys[i] != -1:
            slot = hash_key(h.keys[i]) & mask
            while bigger.keys[slot] != -1:
                slot = (slot + 1) & mask
            bigger.keys[slot] = h.keys[i]
            bigger.vals[slot] = h.vals[i]
    bigger.size = h.size
    hashmap_free(h)
    h[0] = bigger
    return 0


cdef inline int64_t hashmap_get_or_insert(HashMap *h, int64_t key, int64_t val) noexcept nogil:
    """Return the value under `key`; if absent, store `val` under it and return -1.

    Returns -2 when the table had to grow and memory ran out (nothing was inserted).
    """
    cdef uint64_t mask, slot
    if 2 * (h.size + 1) > h.capacity:
        if hashmap_grow(h) != 0:
            return -2
    mask = <uint64_t> (h.capacity - 1)
    slot = hash_key(key) & mask
    while True:
        if h.keys[slot] == key:
            return h.vals[slot]
        if h.keys[slot] == -1:
            h.keys[slot] = key
            h.vals[slot] = val
            h.size += 1
            return -1
        slot = (slot + 1) & mask
