/*
 * stencil_hand.c -- a hand-written leapfrog loop on a rows x cols torus,
 * the yardstick `sheafsynth bench` holds a compiled 64 x 64 torus field
 * against (host/bench.py, "field vs hand-written").
 *
 * Same update and arithmetic as the field cell's wave step in velocity
 * form (engine/fieldprog.py, engine/fieldgen.py): with u the displacement
 * and v = u - u_prev,
 *
 *     v+ = cv v - cl (4 u - u_west - u_east - u_north - u_south) + cr u
 *     v+ += strike weights * input,   u += v+
 *
 * and the output is the pickup (up to 4 weighted vertices of u, read
 * before the step, rounded to float).  Written the way one writes it by
 * hand: an unpadded row-major array, the neighbouring rows found by
 * wrapping the row index, the first and last column by wrapping the column
 * index, the inner columns one plain loop the compiler can vectorise.
 * FTZ/DAZ is set.  Benchmark use only; nothing here allocates.
 *
 * The state's element type is SSB_T_REAL (float unless defined before this
 * file, as the kernel's field state is float or double); SSB_T_NAME(x)
 * names every symbol, so host/bench.py can compile one copy per type.
 */
#include <stddef.h>
#include <stdint.h>
#include <string.h>
#include <time.h>

#ifndef SSB_T_REAL
#define SSB_T_REAL float
#define SSB_T_NAME(x) x
#endif

int64_t ssb_now_ns(void);   /* drive.c: the benchmark clock */

#if (defined(__SSE__) || defined(__x86_64__)) && !defined(SSB_T_MXCSR)
#include <xmmintrin.h>
#define SSB_T_MXCSR 1
#endif

#ifndef SSB_T_POINTS
#define SSB_T_POINTS 4
#endif

typedef SSB_T_REAL SSB_T_NAME(ssb_real);

typedef struct SSB_T_NAME(ssb_torus) {
    int32_t rows, cols;
    float cv, cl, cr;
    int32_t n_strike, n_pick;
    int32_t strike[SSB_T_POINTS], pick[SSB_T_POINTS];
    float sw[SSB_T_POINTS], pw[SSB_T_POINTS];
    float out_gain;
    SSB_T_NAME(ssb_real) *u, *v;
} SSB_T_NAME(ssb_torus);

static size_t SSB_T_NAME(ssb_t_align)(size_t x) { return (x + 63u) & ~(size_t)63u; }

size_t SSB_T_NAME(ssb_torus_bytes)(int rows, int cols) {
    size_t plane = SSB_T_NAME(ssb_t_align)((size_t)rows * (size_t)cols * sizeof(SSB_T_NAME(ssb_real)));
    return SSB_T_NAME(ssb_t_align)(sizeof(SSB_T_NAME(ssb_torus))) + 2u * plane + 64u;
}

/* Points are vertex indices r * cols + c with weights; at most 4 of each. */
int SSB_T_NAME(ssb_torus_init)(void *mem, int rows, int cols, float cv, float cl, float cr,
                               int n_strike, const int32_t *strike, const float *sw,
                               int n_pick, const int32_t *pick, const float *pw, float out_gain) {
    char *base = (char *)mem;
    SSB_T_NAME(ssb_torus) *T = (SSB_T_NAME(ssb_torus) *)base;
    size_t plane = SSB_T_NAME(ssb_t_align)((size_t)rows * (size_t)cols * sizeof(SSB_T_NAME(ssb_real)));
    int i;
    if (!mem || rows < 3 || cols < 3 || n_strike < 0 || n_strike > SSB_T_POINTS || n_pick < 0
        || n_pick > SSB_T_POINTS)
        return -1;
    memset(T, 0, sizeof(*T));
    T->rows = rows;
    T->cols = cols;
    T->cv = cv;
    T->cl = cl;
    T->cr = cr;
    T->n_strike = n_strike;
    T->n_pick = n_pick;
    for (i = 0; i < n_strike; ++i) { T->strike[i] = strike[i]; T->sw[i] = sw[i]; }
    for (i = 0; i < n_pick; ++i) { T->pick[i] = pick[i]; T->pw[i] = pw[i]; }
    T->out_gain = out_gain;
    T->u = (SSB_T_NAME(ssb_real) *)(base + SSB_T_NAME(ssb_t_align)(sizeof(SSB_T_NAME(ssb_torus))));
    T->v = (SSB_T_NAME(ssb_real) *)((char *)T->u + plane);
    memset(T->u, 0, 2u * plane);
    return 0;
}

static void SSB_T_NAME(ssb_torus_step)(SSB_T_NAME(ssb_torus) *T, float x) {
    const int R = T->rows, C = T->cols;
    const float cv = T->cv, cl = T->cl, cr = T->cr;
    SSB_T_NAME(ssb_real) *restrict u = T->u;
    SSB_T_NAME(ssb_real) *restrict v = T->v;
    int r, c, i;
    for (r = 0; r < R; ++r) {
        const SSB_T_NAME(ssb_real) *un = u + (size_t)(r == 0 ? R - 1 : r - 1) * C;
        const SSB_T_NAME(ssb_real) *us = u + (size_t)(r == R - 1 ? 0 : r + 1) * C;
        const SSB_T_NAME(ssb_real) *u0 = u + (size_t)r * C;
        SSB_T_NAME(ssb_real) *v0 = v + (size_t)r * C;
        v0[0] = cv * v0[0] - cl * (4.0f * u0[0] - u0[C - 1] - u0[1] - un[0] - us[0]) + cr * u0[0];
        for (c = 1; c < C - 1; ++c)
            v0[c] = cv * v0[c] - cl * (4.0f * u0[c] - u0[c - 1] - u0[c + 1] - un[c] - us[c]) + cr * u0[c];
        v0[C - 1] = cv * v0[C - 1] - cl * (4.0f * u0[C - 1] - u0[C - 2] - u0[0] - un[C - 1] - us[C - 1])
                    + cr * u0[C - 1];
    }
    if (x != 0.0f)
        for (i = 0; i < T->n_strike; ++i) v[T->strike[i]] += T->sw[i] * x;
    for (i = 0; i < R * C; ++i) u[i] += v[i];
}

/* frames samples: out[n] = pickup of u, then one step driven by input[n].  Returns ns. */
int64_t SSB_T_NAME(ssb_torus_run)(void *mem, const float *input, float *out, int frames) {
    SSB_T_NAME(ssb_torus) *T = (SSB_T_NAME(ssb_torus) *)mem;
    int64_t t0;
    int n, i;
#ifdef SSB_T_MXCSR
    unsigned int saved = _mm_getcsr();
    _mm_setcsr(saved | 0x8040u);
#endif
    t0 = ssb_now_ns();
    for (n = 0; n < frames; ++n) {
        SSB_T_NAME(ssb_real) p = 0;
        float y;
        for (i = 0; i < T->n_pick; ++i) p = i ? p + T->pw[i] * T->u[T->pick[i]] : T->pw[i] * T->u[T->pick[i]];
        y = (float)p;
        out[n] = T->out_gain == 1.0f ? y : T->out_gain * y;
        SSB_T_NAME(ssb_torus_step)(T, input[n]);
    }
    t0 = ssb_now_ns() - t0;
#ifdef SSB_T_MXCSR
    _mm_setcsr(saved);
#endif
    return t0;
}
