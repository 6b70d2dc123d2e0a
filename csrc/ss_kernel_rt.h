/*
 * ss_kernel_rt.h -- hand-written runtime pieces every generated kernel includes.
 *
 * Denormal guard, the noise generator, the phase-delay evaluator used for
 * pitch tracking, and the output safety limiter.  All functions are static
 * (each kernel module gets its own copy; nothing here is exported) and all
 * are real-time safe: no allocation, no locks, no I/O.
 *
 * The NumPy reference stepper (engine/reference.py, engine/voicing.py,
 * engine/tuning.py) implements the same arithmetic; keep them in step.
 */
#ifndef SS_KERNEL_RT_H
#define SS_KERNEL_RT_H

#include <math.h>
#include <stddef.h>
#include <stdint.h>
#include <string.h>

#include "ss_abi.h"

#if defined(__SSE__) || defined(__x86_64__)
#include <xmmintrin.h>
#define SS_HAVE_MXCSR 1
#endif

/* Cache hint (no effect on results): w = 1 when the line will be written. */
#if defined(__GNUC__) || defined(__clang__)
#define SS_PREFETCH(p, w) __builtin_prefetch((p), (w), 3)
#else
#define SS_PREFETCH(p, w) ((void)(p))
#endif

/* ---- voice life cycle (engine/voicing.py) and the common struct heads ---- */

#define SS_FREE      0
#define SS_HELD      1
#define SS_SUSTAINED 2
#define SS_RELEASED  3
#define SS_FADING    4

/* Fields every generated voice struct starts with. */
#define SS_VOICE_COMMON                                                    \
    int32_t status, note, vel;                                             \
    uint32_t order;                                                        \
    int32_t pend_note, pend_vel, pend_release;                             \
    int32_t fade_left;      /* samples left in a fade, -1 = not fading */  \
    uint32_t rng;                                                          \
    int32_t exc_left;                                                      \
    float exc_amp, exc_pole, exc_y;                                        \
    float peak;             /* peak |out| in the current block */          \
    int32_t quiet;          /* samples spent below the held silence level */\
    uint32_t pos;           /* ring write position shared by all delays */

/* Fields every generated state struct starts with (counters first: ss_abi.h). */
#define SS_STATE_COMMON                                                    \
    ss_counters counters;                                                  \
    int32_t prepared;                                                      \
    uint32_t seed, started;                                                \
    int32_t sustain;                                                       \
    float bend;             /* semitones */                                \
    int32_t retune;         /* pitch or parameters moved: retune voices */ \
    double rate;            /* Hz */                                       \
    float inv_fade;                                                        \
    ss_limiter lim;

/* ---- denormals: flush to zero / denormals are zero for one render call ---- */

typedef struct { unsigned int saved; } ss_fpstate;

static inline ss_fpstate ss_ftz_enter(void) {
    ss_fpstate st = {0};
#ifdef SS_HAVE_MXCSR
    st.saved = _mm_getcsr();
    _mm_setcsr(st.saved | 0x8040u);  /* FTZ (bit 15) | DAZ (bit 6) */
#elif defined(__aarch64__)
    uint64_t fpcr;
    __asm__ __volatile__("mrs %0, fpcr" : "=r"(fpcr));
    st.saved = (unsigned int)fpcr;
    fpcr |= (1u << 24);               /* FZ */
    __asm__ __volatile__("msr fpcr, %0" : : "r"(fpcr));
#endif
    return st;
}

static inline void ss_ftz_leave(ss_fpstate st) {
#ifdef SS_HAVE_MXCSR
    _mm_setcsr(st.saved);
#elif defined(__aarch64__)
    uint64_t fpcr = st.saved;
    __asm__ __volatile__("msr fpcr, %0" : : "r"(fpcr));
#else
    (void)st;
#endif
}

/* ---- noise: xorshift32 (Marsaglia 2003), per-note seed mix ---- */

static inline uint32_t ss_xorshift32(uint32_t x) {
    x ^= x << 13;
    x ^= x >> 17;
    x ^= x << 5;
    return x;
}

static inline float ss_noise_value(uint32_t x) {
    return (float)((double)(int32_t)x * (1.0 / 2147483648.0));
}

static inline uint32_t ss_seed_voice(uint32_t seed, uint32_t started) {
    uint32_t h = seed * 0x9E3779B1u + started * 0x85EBCA77u;
    h ^= h >> 16;
    h *= 0x85EBCA6Bu;
    h ^= h >> 13;
    h *= 0xC2B2AE35u;
    h ^= h >> 16;
    return h ? h : 1u;
}

/* ---- pitch: MIDI note to Hz (MIDI 1.0 numbering, A4 = 440 Hz) ---- */

static inline double ss_note_hz(double note) {
    return 440.0 * pow(2.0, (note - 69.0) / 12.0);
}

/*
 * Phase of H(e^{jw}) = D + C (zI - A)^{-1} B for a single-input
 * single-output path of a small block (k <= SS_MAX_TUNE_STATES), in
 * radians.  A is k x k row-major, B and C are length k.  Gaussian
 * elimination with partial pivoting in complex double.
 */
#define SS_MAX_TUNE_STATES 16

static inline double ss_block_phase(int k, const double *A, const double *B, const double *C,
                             double D, double w) {
    double mr[SS_MAX_TUNE_STATES][SS_MAX_TUNE_STATES + 1];
    double mi[SS_MAX_TUNE_STATES][SS_MAX_TUNE_STATES + 1];
    double zr = cos(w), zi = sin(w);
    double hr = D, hi = 0.0;
    int i, j, r;
    if (k <= 0) return atan2(0.0, D);
    if (k > SS_MAX_TUNE_STATES) return 0.0;
    for (i = 0; i < k; ++i) {
        for (j = 0; j < k; ++j) {
            mr[i][j] = (i == j ? zr : 0.0) - A[i * k + j];
            mi[i][j] = (i == j ? zi : 0.0);
        }
        mr[i][k] = B[i];
        mi[i][k] = 0.0;
    }
    for (i = 0; i < k; ++i) {
        int p = i;
        double best = mr[i][i] * mr[i][i] + mi[i][i] * mi[i][i];
        for (r = i + 1; r < k; ++r) {
            double m = mr[r][i] * mr[r][i] + mi[r][i] * mi[r][i];
            if (m > best) { best = m; p = r; }
        }
        if (best == 0.0) return 0.0;
        if (p != i) {
            for (j = 0; j <= k; ++j) {
                double t = mr[i][j]; mr[i][j] = mr[p][j]; mr[p][j] = t;
                t = mi[i][j]; mi[i][j] = mi[p][j]; mi[p][j] = t;
            }
        }
        for (r = i + 1; r < k; ++r) {
            /* f = m[r][i] / m[i][i] */
            double dr = mr[i][i], di = mi[i][i], den = dr * dr + di * di;
            double fr = (mr[r][i] * dr + mi[r][i] * di) / den;
            double fi = (mi[r][i] * dr - mr[r][i] * di) / den;
            for (j = i; j <= k; ++j) {
                mr[r][j] -= fr * mr[i][j] - fi * mi[i][j];
                mi[r][j] -= fr * mi[i][j] + fi * mr[i][j];
            }
        }
    }
    {
        double xr[SS_MAX_TUNE_STATES], xi[SS_MAX_TUNE_STATES];
        for (i = k - 1; i >= 0; --i) {
            double sr = mr[i][k], si = mi[i][k];
            for (j = i + 1; j < k; ++j) {
                sr -= mr[i][j] * xr[j] - mi[i][j] * xi[j];
                si -= mr[i][j] * xi[j] + mi[i][j] * xr[j];
            }
            {
                double dr = mr[i][i], di = mi[i][i], den = dr * dr + di * di;
                xr[i] = (sr * dr + si * di) / den;
                xi[i] = (si * dr - sr * di) / den;
            }
        }
        for (i = 0; i < k; ++i) {
            hr += C[i] * xr[i];
            hi += C[i] * xi[i];
        }
    }
    return atan2(hi, hr);
}

/* Allpass coefficient with phase delay tau (samples) at w (rad/sample). */
static inline double ss_allpass_coef(double tau, double w) {
    return sin(w * (1.0 - tau) / 2.0) / sin(w * (1.0 + tau) / 2.0);
}

/* ---- output safety limiter: instant attack, exponential release ---- */

typedef struct {
    float gain;      /* current gain, 1 = transparent */
    float release;   /* per-sample approach toward 1 */
    float ceiling;   /* absolute output ceiling (linear) */
    int32_t on;
} ss_limiter;

static inline void ss_limiter_init(ss_limiter *L, double rate, double release_s, float ceiling) {
    L->gain = 1.0f;
    L->release = (float)(1.0 - exp(-1.0 / (release_s * rate)));
    L->ceiling = ceiling;
    L->on = 1;
}

/* Largest |x[i]| over n samples (a NaN never wins), on 8 running maxima. */
static inline float ss_peak(const float *x, int n) {
    float p[8] = {0.0f, 0.0f, 0.0f, 0.0f, 0.0f, 0.0f, 0.0f, 0.0f};
    int i = 0, k;
    for (; i + 8 <= n; i += 8)
        for (k = 0; k < 8; ++k) {
            const float a = fabsf(x[i + k]);
            p[k] = a > p[k] ? a : p[k];
        }
    for (; i < n; ++i) {
        const float a = fabsf(x[i]);
        p[0] = a > p[0] ? a : p[0];
    }
    for (k = 1; k < 8; ++k) p[0] = p[k] > p[0] ? p[k] : p[0];
    return p[0];
}

/* Limit n samples in place; returns the peak after limiting. */
static inline float ss_limiter_run(ss_limiter *L, float *x, int n) {
    float g = L->gain, c = L->ceiling, peak = 0.0f;
    int i;
    if (!L->on) return ss_peak(x, n);
    /* The gain at rest (1, or as near 1 as the release step still moves it:
     * the step below leaves it unchanged) and no sample reaching the ceiling:
     * the loop below would scale by g and touch nothing else, so skip its
     * sample-by-sample gain recursion.  Same samples, same peak. */
    if (g + (1.0f - g) * L->release == g) {
        const float p = ss_peak(x, n);
        if (!(p * g > c)) {
            if (g != 1.0f)
                for (i = 0; i < n; ++i) x[i] *= g;
            return p * g;
        }
    }
    for (i = 0; i < n; ++i) {
        float a = fabsf(x[i]);
        float y;
        if (a * g > c) g = c / a;
        y = x[i] * g;
        g = g + (1.0f - g) * L->release;
        if (y > c) y = c;
        if (y < -c) y = -c;
        x[i] = y;
        a = fabsf(y);
        if (a > peak) peak = a;
    }
    L->gain = g;
    return peak;
}

#endif /* SS_KERNEL_RT_H */
