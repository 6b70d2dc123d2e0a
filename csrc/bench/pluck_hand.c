/*
 * pluck_hand.c -- a hand-written plucked-string voice loop, the yardstick
 * `sheafsynth bench` holds the generated kernel of the plain plucked preset
 * against (host/bench.py, "generated vs hand-written").
 *
 * Same voices, same arithmetic as that preset's step program, written the
 * way one would write it by hand: per voice a power-of-two ring sized to
 * its own loop length (or to a size the caller gives: the benchmark also
 * runs it with the kernel's ring sizes, which leave room for pitch bends), read `len` samples back, scaled by the loop gain,
 * a two-tap average, a first-order tuning allpass as one normalized
 * lattice section (y = t x + c s, s <- c x - t s, c = sqrt(1 - t^2)),
 * written back with the excitation added;
 * the voice output is half the ring read, summed into the block.  The
 * excitation (a one-pole-smoothed xorshift32 noise burst, one period long)
 * runs in its own loop so the sustained loop carries no branch.  No
 * release, no fades, no guard, no limiter: those are the kernel's extras.
 * FTZ/DAZ is set for the call, as the kernel does.
 *
 * Memory is one block the caller allocates (ssb_pluck_bytes); nothing here
 * allocates.  Benchmark use only.
 */
#include <stddef.h>
#include <stdint.h>
#include <math.h>
#include <string.h>
#include <time.h>

int64_t ssb_now_ns(void);   /* drive.c: the benchmark clock */

#if defined(__SSE__) || defined(__x86_64__)
#include <xmmintrin.h>
#define SSB_MXCSR 1
#endif

typedef struct ssb_pvoice {
    uint32_t off;        /* ring start (floats from the ring area) */
    uint32_t mask;       /* ring size - 1 */
    uint32_t len;        /* loop delay in samples */
    uint32_t pos;        /* write position */
    float tune, tunec;   /* allpass lattice coefficients t and sqrt(1 - t^2) */
    float s_avg;         /* average: previous input */
    float ap_s;          /* allpass lattice state */
    uint32_t rng;
    int32_t exc_left;
    float exc_amp, exc_pole, exc_y;
} ssb_pvoice;

typedef struct ssb_pluck {
    int32_t n;
    float decay;         /* loop gain (the kernel's parameter value) */
    float out_gain;      /* output wire gain */
    uint32_t ring_floats;
    ssb_pvoice *v;
    float *rings;
} ssb_pluck;

static uint32_t ssb_ring_size(int32_t len) {
    uint32_t s = 4u;
    while (s < (uint32_t)len + 2u) s <<= 1;
    return s;
}

static size_t ssb_align(size_t x) { return (x + 63u) & ~(size_t)63u; }

static uint32_t ssb_voice_ring(const int32_t *lens, const int32_t *sizes, int i) {
    uint32_t s = ssb_ring_size(lens[i]);
    if (sizes && sizes[i] > 0) {
        uint32_t t = 4u;
        while (t < (uint32_t)sizes[i]) t <<= 1;
        if (t > s) s = t;
    }
    return s;
}

/* Bytes for n voices with these loop lengths (sizes: ring floats per voice, or NULL). */
size_t ssb_pluck_bytes(int n, const int32_t *lens, const int32_t *sizes) {
    size_t floats = 0;
    int i;
    for (i = 0; i < n; ++i) floats += ssb_voice_ring(lens, sizes, i);
    return ssb_align(sizeof(ssb_pluck)) + ssb_align((size_t)n * sizeof(ssb_pvoice)) + floats * sizeof(float) + 64u;
}

/* Set up n voices in mem (ssb_pluck_bytes(n, lens, sizes) bytes). */
int ssb_pluck_init(void *mem, int n, const int32_t *lens, const int32_t *sizes, const float *tunes,
                   const uint32_t *seeds, const int32_t *exc_len, const float *exc_amp, const float *exc_pole,
                   float decay, float out_gain) {
    char *base = (char *)mem;
    ssb_pluck *P = (ssb_pluck *)base;
    uint32_t off = 0;
    int i;
    if (!mem || n <= 0) return -1;
    P->n = n;
    P->decay = decay;
    P->out_gain = out_gain;
    P->v = (ssb_pvoice *)(base + ssb_align(sizeof(ssb_pluck)));
    P->rings = (float *)(base + ssb_align(sizeof(ssb_pluck)) + ssb_align((size_t)n * sizeof(ssb_pvoice)));
    for (i = 0; i < n; ++i) {
        ssb_pvoice *v = &P->v[i];
        uint32_t size = ssb_voice_ring(lens, sizes, i);
        memset(v, 0, sizeof(*v));
        v->off = off;
        v->mask = size - 1u;
        v->len = (uint32_t)lens[i];
        v->tune = tunes[i];
        v->tunec = (float)sqrt(1.0 - (double)tunes[i] * (double)tunes[i]);
        v->rng = seeds[i];
        v->exc_left = exc_len[i];
        v->exc_amp = exc_amp[i];
        v->exc_pole = exc_pole[i];
        memset(P->rings + off, 0, size * sizeof(float));
        off += size;
    }
    P->ring_floats = off;
    return 0;
}

static inline uint32_t ssb_xorshift32(uint32_t x) {
    x ^= x << 13;
    x ^= x >> 17;
    x ^= x << 5;
    return x;
}

/* Render one block of `frames` samples into out (overwritten). */
void ssb_pluck_render(void *mem, float *out, int frames) {
    ssb_pluck *P = (ssb_pluck *)mem;
    const float c = P->decay, og = P->out_gain;
    int i, n;
#ifdef SSB_MXCSR
    unsigned int saved = _mm_getcsr();
    _mm_setcsr(saved | 0x8040u);
#endif
    for (n = 0; n < frames; ++n) out[n] = 0.0f;
    for (i = 0; i < P->n; ++i) {
        ssb_pvoice *v = &P->v[i];
        float *r = P->rings + v->off;
        const uint32_t m = v->mask, len = v->len;
        const float t = v->tune, tc = v->tunec;
        uint32_t pos = v->pos;
        float s1 = v->s_avg, as = v->ap_s;
        n = 0;
        if (v->exc_left > 0) {
            const float amp = v->exc_amp, q = v->exc_pole;
            uint32_t rng = v->rng;
            float ey = v->exc_y;
            int stop = v->exc_left < frames ? v->exc_left : frames;
            for (; n < stop; ++n) {
                const float x1 = r[(pos - len) & m];
                const float u = c * x1;
                const float avg = 0.5f * u + 0.5f * s1;
                const float ap = t * avg + tc * as;
                float x0;
                rng = ssb_xorshift32(rng);
                ey = (1.0f - q) * (float)((double)(int32_t)rng * (1.0 / 2147483648.0)) + q * ey;
                x0 = amp * ey;
                s1 = u;
                as = tc * avg - t * as;
                r[pos & m] = x0 + ap;
                out[n] += og * x1;
                pos++;
            }
            v->exc_left -= stop;
            v->rng = rng;
            v->exc_y = ey;
        }
        for (; n < frames; ++n) {
            const float x1 = r[(pos - len) & m];
            const float u = c * x1;
            const float avg = 0.5f * u + 0.5f * s1;
            const float ap = t * avg + tc * as;
            s1 = u;
            as = tc * avg - t * as;
            r[pos & m] = ap;
            out[n] += og * x1;
            pos++;
        }
        v->pos = pos;
        v->s_avg = s1;
        v->ap_s = as;
    }
#ifdef SSB_MXCSR
    _mm_setcsr(saved);
#endif
}

/* nblocks blocks; returns elapsed ns.  keep: as ssb_drive (drive.c). */
int64_t ssb_pluck_run(void *mem, float *out, int frames, int nblocks, int keep) {
    int64_t t0;
    int k;
    if (!mem || !out || frames <= 0 || nblocks <= 0) return -1;
    t0 = ssb_now_ns();
    for (k = 0; k < nblocks; ++k) ssb_pluck_render(mem, keep ? out + (int64_t)k * frames : out, frames);
    return ssb_now_ns() - t0;
}
