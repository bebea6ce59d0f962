/* One decode step of a fused, float16 ("halved") pre-norm decoder with RMS norms, rotary keys and a gated
 * SiLU feed-forward, for one sequence: the token's embedding in, the next logits out, the KV cache written
 * at the position. Built and called by attncompress/native.py, which describes the model in the structs
 * below; the Python path (model.py) is the reference this must equal.
 *
 * Why: a decode step is ~270 one-row matrix products plus ~1,200 small operations; through torch each small
 * operation costs a few microseconds of dispatch, about half of the step (benchmarks/results/decode_profile.md).
 * Here the whole step is one call and one OpenMP parallel region; the products split their rows over the
 * threads, the small work runs on one thread between barriers.
 *
 * Rounding follows `model.product` exactly: a product's input is rounded to float16, it accumulates in
 * float32, its output is rounded to float16 and widened, then its bias (float32) is added; the second matrix
 * of a factor pair reads the rounded output of the first. Norms, rotary, attention, activations, residuals
 * and the cache are float32. Only the order of the float32 sums differs from torch's kernels.
 */
#include <math.h>
#include <stddef.h>
#include <stdint.h>
#include <string.h>
#if defined(__AVX512F__) && defined(__AVX512BW__) && defined(__AVX512VL__) && defined(__F16C__)
#include <immintrin.h>
#define WIDE 1
#endif

typedef struct {
    const uint16_t *w;  /* (rows, cols) float16, row-major; NULL: no matrix */
    const float *bias;  /* (rows,) or NULL */
    int32_t rows, cols;
} Mat;

typedef struct {
    const float *attn_norm, *ff_norm;  /* (d,) */
    Mat qkv;                           /* the stacked first matrices of q, k, v (SharedInput.first) */
    int32_t qkv_sizes[3];
    Mat qkv_second[3];                 /* a low-rank part's `a`; w NULL: a dense part */
    Mat o, o_second;                   /* o: dense weight or the factor bᵀ; o_second: a, or w NULL */
    const float *inv_freq;             /* (g, w_qk / 2) rotary frequencies of the kept pairs, or NULL */
    float *k_cache, *v_cache;          /* (g, T, w_qk), (g, T, w_vo): sequence 0 of the cache */
    int32_t w_qk, w_vo, cache_len;
    Mat gu;                            /* stacked first matrices of gate and up */
    int32_t gu_sizes[2];
    Mat gu_second[2];
    Mat down, down_second;
} Layer;

typedef struct {
    int32_t n_layers, d, heads, kv_heads, vocab, threads;
    float eps, scale;
    const uint16_t *tokens_half;  /* (V, d) float16 embedding table, or NULL */
    const float *tokens_float;    /* (V, d) float32 table when tokens_half is NULL */
    const float *final_norm;      /* (d,) */
    Mat head;                     /* (V, d) */
    Layer *layers;
    float *work;                  /* work_floats(model) floats */
    int32_t width;                /* floats per work buffer, set by work_floats */
} Model;

static inline float half_to_float(uint16_t h) {
#ifdef WIDE
    return _cvtsh_ss(h);
#else
    uint32_t s = (uint32_t)(h & 0x8000) << 16, e = (h >> 10) & 0x1f, m = h & 0x3ff, bits;
    if (e == 0) {
        if (m == 0) {
            bits = s;
        } else {  /* subnormal: normalise */
            e = 113;
            while (!(m & 0x400)) { m <<= 1; e--; }
            bits = s | (e << 23) | ((m & 0x3ff) << 13);
        }
    } else if (e == 31) {
        bits = s | 0x7f800000 | (m << 13);
    } else {
        bits = s | ((e + 112) << 23) | (m << 13);
    }
    float f;
    memcpy(&f, &bits, 4);
    return f;
#endif
}

static inline float round_half(float x) {
#ifdef WIDE
    return _cvtsh_ss(_cvtss_sh(x, _MM_FROUND_TO_NEAREST_INT | _MM_FROUND_NO_EXC));
#else
    return (float)(_Float16)x;
#endif
}

static int32_t max32(int32_t a, int32_t b) { return a > b ? a : b; }

/* The longest vector a step holds: every buffer of the work area has this many floats. */
static int32_t widest(const Model *m) {
    int32_t w = max32(m->d, m->heads * m->layers[0].cache_len);
    for (int l = 0; l < m->n_layers; l++) {
        const Layer *L = &m->layers[l];
        const Mat *mats[] = {&L->qkv, &L->qkv_second[0], &L->qkv_second[1], &L->qkv_second[2], &L->o,
                             &L->o_second, &L->gu, &L->gu_second[0], &L->gu_second[1], &L->down, &L->down_second};
        for (size_t i = 0; i < sizeof mats / sizeof mats[0]; i++) w = max32(w, max32(mats[i]->rows, mats[i]->cols));
        w = max32(w, m->heads * max32(L->w_qk, L->w_vo));
        w = max32(w, m->heads * L->cache_len);
    }
    return w;
}

#define BUFFERS 9
/* The work area's size for the bound cache; records the buffer width, so a step does not recompute it. */
int64_t work_floats(Model *m) {
    m->width = widest(m);
    return (int64_t)BUFFERS * m->width;
}

/* Blocks of four rows ahead that a product asks the memory for while it reads the current one: the block's
 * bytes are contiguous, so two cache lines per 16 columns cover the block AHEAD blocks on at the rate this
 * one is read. Without prefetching one core read about 16 GB/s on this project's machine (a step of the
 * built-in SmolLM2 took 17-20 ms on one thread); asking for each row's data 4 rows on, about 28 (10 ms);
 * this linear form 10-15% faster again than that, 2 and 4 blocks alike, 8 slower (scratch builds, one
 * interleaved run each). */
#define AHEAD 2

/* Rows 4b..4b+3 of y = round_half(W x) + bias for rounded x. */
static inline void gemv_block(const Mat *mt, const float *x, float *y, int32_t b) {
    const int32_t R = mt->rows, C = mt->cols;
    const int32_t j0 = 4 * b, nr = R - j0 < 4 ? R - j0 : 4;
    const uint16_t *r[4];
    for (int q = 0; q < 4; q++) r[q] = mt->w + (size_t)(j0 + (q < nr ? q : 0)) * C;
    float s[4];
#ifdef WIDE
    __m512 a0 = _mm512_setzero_ps(), a1 = a0, a2 = a0, a3 = a0;
    int32_t i = 0;
    for (; i + 16 <= C; i += 16) {
        const __m512 xv = _mm512_loadu_ps(x + i);
        const char *ahead = (const char *)(r[0] + (size_t)AHEAD * 4 * C) + 8 * (size_t)i;
        _mm_prefetch(ahead, _MM_HINT_T0);
        _mm_prefetch(ahead + 64, _MM_HINT_T0);
        a0 = _mm512_fmadd_ps(_mm512_cvtph_ps(_mm256_loadu_si256((const __m256i *)(r[0] + i))), xv, a0);
        a1 = _mm512_fmadd_ps(_mm512_cvtph_ps(_mm256_loadu_si256((const __m256i *)(r[1] + i))), xv, a1);
        a2 = _mm512_fmadd_ps(_mm512_cvtph_ps(_mm256_loadu_si256((const __m256i *)(r[2] + i))), xv, a2);
        a3 = _mm512_fmadd_ps(_mm512_cvtph_ps(_mm256_loadu_si256((const __m256i *)(r[3] + i))), xv, a3);
    }
    if (i < C) {  /* the last C mod 16 columns, masked (a factor's rank is rarely a multiple of 16) */
        const __mmask16 k = (__mmask16)((1u << (C - i)) - 1);
        const __m512 xv = _mm512_maskz_loadu_ps(k, x + i);
        a0 = _mm512_fmadd_ps(_mm512_cvtph_ps(_mm256_maskz_loadu_epi16(k, r[0] + i)), xv, a0);
        a1 = _mm512_fmadd_ps(_mm512_cvtph_ps(_mm256_maskz_loadu_epi16(k, r[1] + i)), xv, a1);
        a2 = _mm512_fmadd_ps(_mm512_cvtph_ps(_mm256_maskz_loadu_epi16(k, r[2] + i)), xv, a2);
        a3 = _mm512_fmadd_ps(_mm512_cvtph_ps(_mm256_maskz_loadu_epi16(k, r[3] + i)), xv, a3);
    }
    s[0] = _mm512_reduce_add_ps(a0), s[1] = _mm512_reduce_add_ps(a1);
    s[2] = _mm512_reduce_add_ps(a2), s[3] = _mm512_reduce_add_ps(a3);
#else
    for (int q = 0; q < 4; q++) {
        float acc = 0.f;
        for (int32_t i = 0; i < C; i++) acc += half_to_float(r[q][i]) * x[i];
        s[q] = acc;
    }
#endif
    for (int q = 0; q < nr; q++) y[j0 + q] = round_half(s[q]) + (mt->bias ? mt->bias[j0 + q] : 0.f);
}

/* y = round_half(W x) + bias for rounded x, rows split over the team (a barrier at the end). */
static void gemv(const Mat *mt, const float *x, float *y) {
    const int32_t blocks = (mt->rows + 3) / 4;
    #pragma omp for schedule(static)
    for (int32_t b = 0; b < blocks; b++) gemv_block(mt, x, y, b);
}

/* Up to 3 independent products in one loop over all their blocks (one barrier instead of one each). */
static void gemv_parts(const Mat *const *mts, const float *const *xs, float *const *ys, int n) {
    int32_t start[4] = {0};
    for (int i = 0; i < n; i++) start[i + 1] = start[i] + (mts[i]->rows + 3) / 4;
    #pragma omp for schedule(static)
    for (int32_t b = 0; b < start[n]; b++) {
        int i = 0;
        while (b >= start[i + 1]) i++;
        gemv_block(mts[i], xs[i], ys[i], b - start[i]);
    }
}

/* Σ a_i b_i over n floats, in 16 lanes (a scalar sum would wait on each addition in turn). */
static inline float dot(const float *a, const float *b, int32_t n) {
#ifdef WIDE
    __m512 acc = _mm512_setzero_ps();
    int32_t i = 0;
    for (; i + 16 <= n; i += 16) acc = _mm512_fmadd_ps(_mm512_loadu_ps(a + i), _mm512_loadu_ps(b + i), acc);
    if (i < n) {
        const __mmask16 k = (__mmask16)((1u << (n - i)) - 1);
        acc = _mm512_fmadd_ps(_mm512_maskz_loadu_ps(k, a + i), _mm512_maskz_loadu_ps(k, b + i), acc);
    }
    return _mm512_reduce_add_ps(acc);
#else
    float acc[8] = {0};
    int32_t i = 0;
    for (; i + 8 <= n; i += 8)
        for (int q = 0; q < 8; q++) acc[q] += a[i + q] * b[i + q];
    for (; i < n; i++) acc[0] += a[i] * b[i];
    return ((acc[0] + acc[1]) + (acc[2] + acc[3])) + ((acc[4] + acc[5]) + (acc[6] + acc[7]));
#endif
}

/* out = round_half(x * rsqrt(mean(x²) + eps) * w): the norm and the rounding of the next product's input. */
static void rms_norm_rounded(const float *x, const float *w, float eps, int32_t d, float *out) {
    const float ss = dot(x, x, d), r = 1.0f / sqrtf(ss / (float)d + eps);
    for (int32_t i = 0; i < d; i++) out[i] = round_half(x[i] * r * w[i]);
}

/* Rotate each kept pair (i, i + p) of the w = 2p values at x by the angle pos · inv[i] (model.rotate). */
static void rotate(float *x, const float *inv, int32_t w, int32_t pos) {
    const int32_t p = w / 2;
    for (int32_t i = 0; i < p; i++) {
        const float a = (float)pos * inv[i], c = cosf(a), s = sinf(a), x1 = x[i], x2 = x[i + p];
        x[i] = x1 * c - x2 * s;
        x[i + p] = x2 * c + x1 * s;
    }
}

/* out = a projection of x: one matrix, or a factor pair through tmp (second->w NULL: one). */
static void projection(const Mat *first, const Mat *second, const float *x, float *tmp, float *out) {
    if (second->w) {
        gemv(first, x, tmp);
        gemv(second, tmp, out);
    } else {
        gemv(first, x, out);
    }
}

/* The projections of a shared input: first product into t, then each part's second matrix, if any, into
 * its own buffer; part i's output is written to out[i]. */
static void shared_input(const Mat *first, const int32_t *sizes, const Mat *second, int parts, const float *x,
                         float *t, float **bufs, const float **out) {
    gemv(first, x, t);
    const Mat *mts[3];
    const float *xs[3];
    float *ys[3];
    int n = 0;
    int32_t off = 0;
    for (int i = 0; i < parts; i++) {
        if (second[i].w) {  /* t holds rounded values: the second product's input */
            mts[n] = &second[i], xs[n] = t + off, ys[n++] = bufs[i];
            out[i] = bufs[i];
        } else {
            out[i] = t + off;
        }
        off += sizes[i];
    }
    if (n) gemv_parts(mts, xs, ys, n);
}

static void attention(const Model *m, const Layer *L, const float *q, const float *k, const float *v,
                      int32_t pos, float *scores, float *y) {
    const int32_t g = m->kv_heads, rep = m->heads / m->kv_heads, wq = L->w_qk, wv = L->w_vo, T = L->cache_len;
    #pragma omp single
    for (int32_t j = 0; j < g; j++) {  /* the new key (rotated) and value into the cache */
        float *kc = L->k_cache + ((size_t)j * T + pos) * wq;
        memcpy(kc, k + (size_t)j * wq, sizeof(float) * wq);
        if (L->inv_freq) rotate(kc, L->inv_freq + (size_t)j * (wq / 2), wq, pos);
        memcpy(L->v_cache + ((size_t)j * T + pos) * wv, v + (size_t)j * wv, sizeof(float) * wv);
    }
    #pragma omp for schedule(static)
    for (int32_t hd = 0; hd < m->heads; hd++) {
        const int32_t j = hd / rep;  /* query head hd reads key/value group j */
        float qh[512];
        memcpy(qh, q + (size_t)hd * wq, sizeof(float) * wq);
        if (L->inv_freq) rotate(qh, L->inv_freq + (size_t)j * (wq / 2), wq, pos);
        float *sc = scores + (size_t)hd * T, mx = -INFINITY;
        const float *kc = L->k_cache + (size_t)j * T * wq, *vc = L->v_cache + (size_t)j * T * wv;
        for (int32_t t = 0; t <= pos; t++) {
            sc[t] = dot(qh, kc + (size_t)t * wq, wq) * m->scale;
            mx = sc[t] > mx ? sc[t] : mx;
        }
        float z = 0.f;
        for (int32_t t = 0; t <= pos; t++) z += (sc[t] = expf(sc[t] - mx));
        float *yh = y + (size_t)hd * wv;
        for (int32_t i = 0; i < wv; i++) yh[i] = 0.f;
        for (int32_t t = 0; t <= pos; t++) {
            const float p = sc[t] / z;
            for (int32_t i = 0; i < wv; i++) yh[i] += p * vc[(size_t)t * wv + i];
        }
        for (int32_t i = 0; i < wv; i++) yh[i] = round_half(yh[i]);  /* the o product's input */
    }
}

/* The logits (vocab,) of `token` at position `pos`; keys and values of every layer written at pos. */
void decode_step(const Model *m, int32_t token, int32_t pos, float *logits) {
    const int32_t d = m->d, W = m->width;
    float *x = m->work, *h = x + W, *t = h + W, *b0 = t + W, *b1 = b0 + W, *b2 = b1 + W, *y = b2 + W;
    float *scores = y + W, *f = scores + W;
    if (m->tokens_half) {
        for (int32_t i = 0; i < d; i++) x[i] = half_to_float(m->tokens_half[(size_t)token * d + i]);
    } else {
        memcpy(x, m->tokens_float + (size_t)token * d, sizeof(float) * d);
    }
    #pragma omp parallel num_threads(m->threads)
    {
        for (int32_t l = 0; l < m->n_layers; l++) {
            const Layer *L = &m->layers[l];
            const float *qkv[3], *gu[2];
            float *bufs[3] = {b0, b1, b2};
            #pragma omp single
            rms_norm_rounded(x, L->attn_norm, m->eps, d, h);
            shared_input(&L->qkv, L->qkv_sizes, L->qkv_second, 3, h, t, bufs, qkv);
            attention(m, L, qkv[0], qkv[1], qkv[2], pos, scores, y);
            projection(&L->o, &L->o_second, y, b1, b0);
            #pragma omp single
            {
                for (int32_t i = 0; i < d; i++) x[i] += b0[i];
                rms_norm_rounded(x, L->ff_norm, m->eps, d, h);
            }
            shared_input(&L->gu, L->gu_sizes, L->gu_second, 2, h, t, bufs, gu);
            const int32_t n = L->gu_second[0].w ? L->gu_second[0].rows : L->gu_sizes[0];  /* d_ff */
            #pragma omp for schedule(static)
            for (int32_t i = 0; i < n; i++) {
                const float a = gu[0][i];
                f[i] = round_half(a / (1.0f + expf(-a)) * gu[1][i]);  /* silu(gate) · up, the down input */
            }
            projection(&L->down, &L->down_second, f, b2, b0);
            #pragma omp single
            for (int32_t i = 0; i < d; i++) x[i] += b0[i];
        }
        #pragma omp single
        rms_norm_rounded(x, m->final_norm, m->eps, d, h);
        gemv(&m->head, h, logits);
    }
}
