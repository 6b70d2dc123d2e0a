/*
 * spsc.h -- single-producer / single-consumer lock-free ring of fixed-size
 * elements, header only.
 *
 * Exactly one thread may call the producer functions (ss_spsc_write*) and
 * exactly one thread the consumer functions (ss_spsc_read*, ss_spsc_peek,
 * ss_spsc_drop).  Positions are free-running 64-bit counters; the capacity
 * is a power of two, so index = position & mask.  The producer publishes
 * with a release store of `head`, the consumer with a release store of
 * `tail`; each side reads the other's counter with an acquire load.
 *
 * Real-time rules: no allocation, no locks, no system calls; every function
 * finishes in time proportional to the number of elements it copies.  The
 * storage is supplied by the caller (allocated once, outside the audio
 * thread).
 */
#ifndef SS_SPSC_H
#define SS_SPSC_H

#include <stddef.h>
#include <stdint.h>
#include <string.h>

#define SS_SPSC_CACHELINE 64

typedef struct ss_spsc {
    /* written by the producer only */
    uint64_t head;
    char pad_head[SS_SPSC_CACHELINE - sizeof(uint64_t)];
    /* written by the consumer only */
    uint64_t tail;
    char pad_tail[SS_SPSC_CACHELINE - sizeof(uint64_t)];
    /* fixed after ss_spsc_init */
    unsigned char *buf;
    uint64_t mask;      /* capacity - 1, capacity in elements */
    size_t elem_size;   /* bytes per element */
} ss_spsc;

/* Smallest power of two >= n (n >= 1); 0 if it would not fit in 32 bits. */
static inline uint32_t ss_spsc_pow2(uint32_t n)
{
    uint32_t c = 1;
    if (n > (UINT32_C(1) << 31)) return 0;
    while (c < n) c <<= 1;
    return c;
}

/* Initialise over `buf`, which holds `capacity` (a power of two) elements.
 * Returns 0, or -1 if capacity is not a power of two. Not thread-safe. */
static inline int ss_spsc_init(ss_spsc *r, void *buf, uint32_t capacity, size_t elem_size)
{
    if (capacity == 0 || (capacity & (capacity - 1)) != 0 || elem_size == 0) return -1;
    r->head = 0;
    r->tail = 0;
    r->buf = (unsigned char *)buf;
    r->mask = (uint64_t)capacity - 1;
    r->elem_size = elem_size;
    return 0;
}

/* Elements ready to read (consumer side). */
static inline uint64_t ss_spsc_readable(const ss_spsc *r)
{
    uint64_t head = __atomic_load_n(&r->head, __ATOMIC_ACQUIRE);
    uint64_t tail = __atomic_load_n(&r->tail, __ATOMIC_RELAXED);
    return head - tail;
}

/* Free space in elements (producer side). */
static inline uint64_t ss_spsc_writable(const ss_spsc *r)
{
    uint64_t tail = __atomic_load_n(&r->tail, __ATOMIC_ACQUIRE);
    uint64_t head = __atomic_load_n(&r->head, __ATOMIC_RELAXED);
    return (r->mask + 1) - (head - tail);
}

static inline void ss_spsc_copy_in_(ss_spsc *r, uint64_t pos, const unsigned char *src, uint64_t n)
{
    uint64_t cap = r->mask + 1;
    uint64_t i = pos & r->mask;
    uint64_t first = (n < cap - i) ? n : cap - i;
    memcpy(r->buf + i * r->elem_size, src, (size_t)(first * r->elem_size));
    if (n > first)
        memcpy(r->buf, src + first * r->elem_size, (size_t)((n - first) * r->elem_size));
}

static inline void ss_spsc_copy_out_(const ss_spsc *r, uint64_t pos, unsigned char *dst, uint64_t n)
{
    uint64_t cap = r->mask + 1;
    uint64_t i = pos & r->mask;
    uint64_t first = (n < cap - i) ? n : cap - i;
    memcpy(dst, r->buf + i * r->elem_size, (size_t)(first * r->elem_size));
    if (n > first)
        memcpy(dst + first * r->elem_size, r->buf, (size_t)((n - first) * r->elem_size));
}

/* Producer: write all `n` elements or none.  Returns 1 if written, 0 if full. */
static inline int ss_spsc_write(ss_spsc *r, const void *src, uint64_t n)
{
    uint64_t head = __atomic_load_n(&r->head, __ATOMIC_RELAXED);
    uint64_t tail = __atomic_load_n(&r->tail, __ATOMIC_ACQUIRE);
    if ((r->mask + 1) - (head - tail) < n) return 0;
    ss_spsc_copy_in_(r, head, (const unsigned char *)src, n);
    __atomic_store_n(&r->head, head + n, __ATOMIC_RELEASE);
    return 1;
}

/* Producer: write as many of `n` elements as fit; returns the count written. */
static inline uint64_t ss_spsc_write_some(ss_spsc *r, const void *src, uint64_t n)
{
    uint64_t head = __atomic_load_n(&r->head, __ATOMIC_RELAXED);
    uint64_t tail = __atomic_load_n(&r->tail, __ATOMIC_ACQUIRE);
    uint64_t room = (r->mask + 1) - (head - tail);
    if (n > room) n = room;
    if (n == 0) return 0;
    ss_spsc_copy_in_(r, head, (const unsigned char *)src, n);
    __atomic_store_n(&r->head, head + n, __ATOMIC_RELEASE);
    return n;
}

/* Consumer: copy the oldest element to `dst` without removing it.
 * Returns 1, or 0 if the ring is empty. */
static inline int ss_spsc_peek(const ss_spsc *r, void *dst)
{
    uint64_t tail = __atomic_load_n(&r->tail, __ATOMIC_RELAXED);
    uint64_t head = __atomic_load_n(&r->head, __ATOMIC_ACQUIRE);
    if (head == tail) return 0;
    ss_spsc_copy_out_(r, tail, (unsigned char *)dst, 1);
    return 1;
}

/* Consumer: remove `n` elements (n <= ss_spsc_readable). */
static inline void ss_spsc_drop(ss_spsc *r, uint64_t n)
{
    uint64_t tail = __atomic_load_n(&r->tail, __ATOMIC_RELAXED);
    __atomic_store_n(&r->tail, tail + n, __ATOMIC_RELEASE);
}

/* Consumer: read up to `n` elements into `dst`; returns the count read. */
static inline uint64_t ss_spsc_read(ss_spsc *r, void *dst, uint64_t n)
{
    uint64_t tail = __atomic_load_n(&r->tail, __ATOMIC_RELAXED);
    uint64_t head = __atomic_load_n(&r->head, __ATOMIC_ACQUIRE);
    uint64_t avail = head - tail;
    if (n > avail) n = avail;
    if (n == 0) return 0;
    ss_spsc_copy_out_(r, tail, (unsigned char *)dst, n);
    __atomic_store_n(&r->tail, tail + n, __ATOMIC_RELEASE);
    return n;
}

#endif /* SS_SPSC_H */
