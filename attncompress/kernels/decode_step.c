/* One decode step of a fused, float16 ("halved") pre-norm decoder with RMS norms, rotary keys and a gated
 * SiLU feed-forward, for one sequence: the token's embedding in, the next logits out, the KV cache written
 * at the position. Built and called by attncompress/native.py, which describes the model in the structs
 * below; the Python path (model.py) is the reference this must equal.
 *
 * Why: a decode step is ~270 one-row matrix products plus ~1,200 small operations; through torch each small
 * operation costs a few microseconds of dispatch, about half of the step (benchmarks/results/decode_profile.md).
 * Here the whole step is one call and one OpenMP parallel region. The products split their rows over the
 * threads; attention splits the cached positions into fixed chunks; the small work between them (the
 * residual, the norms, the merge of the chunks) is done by every thread into its own buffers, so a layer
 * has one barrier per product (5 for a dense layer) and no single-thread section. Every split is the same
 * for any number of threads, so the bits are too.
 *
 * Rounding follows `model.product` exactly: a product's input is rounded to float16, it accumulates in
 * float32, its output is rounded to float16 and widened, then its bias (float32) is added; the second matrix
 * of a factor pair reads the rounded output of the first. Norms, rotary, attention, activations, residuals
 * and the cache are float32. Only the order of the float32 sums differs from torch's kernels.
 */
#include <math.h>
#include <omp.h>
#include <stddef.h>
#include <stdint.h>
#include <string.h>
#if defined(__AVX512F__) && defined(__AVX512BW__) && defined(__AVX512VL__) && defined(__F16C__)
#include <immintrin.h>
#define WIDE 1
/* The first min(n, 16) of 16 lanes (n ≥ 1): the mask of a vector's last, partial, load or store. */
static inline __mmask16 lanes(int32_t n) { return (__mmask16)(n >= 16 ? 0xffff : (1u << n) - 1); }
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
    int32_t width;                /* floats per shared work buffer, set by work_floats */
    int32_t own, part;            /* floats of each thread's own buffers, of the attention partials */
    int32_t w_qk, w_vo;           /* the widest query/key and value heads of any layer; all set by work_floats */
} Model;

#define MAX_THREADS 64

/* Built with -DPROFILE (benchmarks/kernel_profile.py): thread 0 adds the time since its previous mark, and the
 * bytes read, to the phase that just ended. A product's phase ends at its barrier, so it includes the wait for
 * the slowest thread; the norms and the attention merge run on every thread and count on thread 0. */
enum { P_NORM, P_QKV, P_QKV2, P_ATTN, P_MERGE, P_O, P_O2, P_GU, P_GATED, P_DOWN, P_DOWN2, P_HEAD, PHASES };
#ifdef PROFILE
double profile_seconds[PHASES], profile_bytes[PHASES];
static double profile_last;
static void mark(int k, double bytes) {
    if (omp_get_thread_num()) return;
    const double now = omp_get_wtime();
    profile_seconds[k] += now - profile_last, profile_bytes[k] += bytes, profile_last = now;
}
#define MARK(k, bytes) mark(k, bytes)
#else
#define MARK(k, bytes) ((void)(k))
#endif
#define MAT_BYTES(mt) (2.0 * (mt)->rows * (mt)->cols)
#define CHUNK 32  /* cached positions per attention work unit */

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

#define BUFFERS 7
/* The work area's size for the bound cache: BUFFERS shared buffers of `width` floats, the attention chunks'
 * partial results and every layer's rotary cosines and sines, and each thread's own buffers (x, h, y, rotated
 * queries). Records the sizes, so a step does not recompute them. */
int64_t work_floats(Model *m) {
    int32_t wq = 0, wv = 0;
    for (int l = 0; l < m->n_layers; l++) wq = max32(wq, m->layers[l].w_qk), wv = max32(wv, m->layers[l].w_vo);
    m->width = widest(m);
    m->w_qk = wq, m->w_vo = wv;
    m->own = 2 * m->d + m->heads * (wv + wq);
    m->part = m->heads * ((m->layers[0].cache_len + CHUNK - 1) / CHUNK) * (2 + wv) + m->n_layers * m->kv_heads * wq;
    return (int64_t)BUFFERS * m->width + m->part + (int64_t)MAX_THREADS * m->own;
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
        const __mmask16 k = lanes(C - i);
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
        const __mmask16 k = lanes(n - i);
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

/* e^x for x clamped to [-87.3, 88.7] (where float32 neither overflows nor goes subnormal): x = n ln2 + r with
 * |r| ≤ ln2 / 2, e^r by its Taylor series to r⁶ (the next term is about 2⁻²³ of the sum), times 2ⁿ. Relative
 * error below 2.3e-7 (about 2⁻²²) against double-precision exp on [-87, 88.7] in steps of 1e-5 (a scratch
 * check, not a test). */
#ifdef WIDE
static inline __m512 exp16(__m512 x) {
    x = _mm512_min_ps(_mm512_max_ps(x, _mm512_set1_ps(-87.3f)), _mm512_set1_ps(88.7f));
    const __m512 n = _mm512_roundscale_ps(_mm512_mul_ps(x, _mm512_set1_ps(1.44269504f)), _MM_FROUND_TO_NEAREST_INT);
    __m512 r = _mm512_fnmadd_ps(n, _mm512_set1_ps(0.693145752f), x);  /* ln2 in two parts: hi exact in n·hi */
    r = _mm512_fnmadd_ps(n, _mm512_set1_ps(1.42860677e-6f), r);
    __m512 p = _mm512_set1_ps(1.f / 720);
    p = _mm512_fmadd_ps(p, r, _mm512_set1_ps(1.f / 120));
    p = _mm512_fmadd_ps(p, r, _mm512_set1_ps(1.f / 24));
    p = _mm512_fmadd_ps(p, r, _mm512_set1_ps(1.f / 6));
    p = _mm512_fmadd_ps(p, r, _mm512_set1_ps(0.5f));
    p = _mm512_fmadd_ps(p, r, _mm512_set1_ps(1.f));
    p = _mm512_fmadd_ps(p, r, _mm512_set1_ps(1.f));
    return _mm512_scalef_ps(p, n);
}
#endif

/* x[i] = e^(x[i] - mx) over n floats; returns their sum. */
static float exp_shifted(float *x, int32_t n, float mx) {
#ifdef WIDE
    const __m512 m = _mm512_set1_ps(mx);
    __m512 acc = _mm512_setzero_ps();
    int32_t i = 0;
    for (; i + 16 <= n; i += 16) {
        const __m512 e = exp16(_mm512_sub_ps(_mm512_loadu_ps(x + i), m));
        _mm512_storeu_ps(x + i, e);
        acc = _mm512_add_ps(acc, e);
    }
    if (i < n) {
        const __mmask16 k = lanes(n - i);
        const __m512 e = _mm512_maskz_mov_ps(k, exp16(_mm512_sub_ps(_mm512_maskz_loadu_ps(k, x + i), m)));
        _mm512_mask_storeu_ps(x + i, k, e);
        acc = _mm512_add_ps(acc, e);
    }
    return _mm512_reduce_add_ps(acc);
#else
    float z = 0.f;
    for (int32_t i = 0; i < n; i++) z += (x[i] = expf(x[i] - mx));
    return z;
#endif
}

/* acc[i] += p · v[i] over n floats. */
static inline void axpy(float *acc, float p, const float *v, int32_t n) {
#ifdef WIDE
    const __m512 pv = _mm512_set1_ps(p);
    int32_t i = 0;
    for (; i + 16 <= n; i += 16)
        _mm512_storeu_ps(acc + i, _mm512_fmadd_ps(pv, _mm512_loadu_ps(v + i), _mm512_loadu_ps(acc + i)));
    if (i < n) {
        const __mmask16 k = lanes(n - i);
        _mm512_mask_storeu_ps(acc + i, k, _mm512_fmadd_ps(pv, _mm512_maskz_loadu_ps(k, v + i),
                                                          _mm512_maskz_loadu_ps(k, acc + i)));
    }
#else
    for (int32_t i = 0; i < n; i++) acc[i] += p * v[i];
#endif
}

/* Ask the memory for the n floats at p (the cache's rows come from memory: the weights read since evicted them). */
static inline void prefetch_row(const float *p, int32_t n) {
#ifdef WIDE
    for (int32_t i = 0; i < n; i += 16) _mm_prefetch((const char *)(p + i), _MM_HINT_T0);
#else
    (void)p, (void)n;
#endif
}

/* acc = Σ_t p[t] · v[t] over n rows of w floats (v row-major): each 16 columns summed in registers over the
 * rows (two chains), so no sum waits on a store. */
static void weighted_rows(float *acc, const float *p, const float *v, int32_t n, int32_t w) {
#ifdef WIDE
    for (int32_t i = 0; i < w; i += 16) {
        const __mmask16 k = lanes(w - i);
        __m512 a0 = _mm512_setzero_ps(), a1 = a0;
        int32_t t = 0;
        for (; t + 2 <= n; t += 2) {
            a0 = _mm512_fmadd_ps(_mm512_set1_ps(p[t]), _mm512_maskz_loadu_ps(k, v + (size_t)t * w + i), a0);
            a1 = _mm512_fmadd_ps(_mm512_set1_ps(p[t + 1]), _mm512_maskz_loadu_ps(k, v + (size_t)(t + 1) * w + i), a1);
        }
        if (t < n) a0 = _mm512_fmadd_ps(_mm512_set1_ps(p[t]), _mm512_maskz_loadu_ps(k, v + (size_t)t * w + i), a0);
        _mm512_mask_storeu_ps(acc + i, k, _mm512_add_ps(a0, a1));
    }
#else
    for (int32_t i = 0; i < w; i++) acc[i] = 0.f;
    for (int32_t t = 0; t < n; t++) axpy(acc, p[t], v + (size_t)t * w, w);
#endif
}

/* out[i] = round_half(x[i] · r · w[i]) over n floats (w NULL: 1); out may be x. */
static void round_scaled(const float *x, const float *w, float r, int32_t n, float *out) {
    int32_t i = 0;
#ifdef WIDE
    const __m512 rv = _mm512_set1_ps(r);
    for (; i < n; i += 16) {
        const __mmask16 k = lanes(n - i);
        __m512 v = _mm512_mul_ps(_mm512_maskz_loadu_ps(k, x + i), rv);
        if (w) v = _mm512_mul_ps(v, _mm512_maskz_loadu_ps(k, w + i));
        v = _mm512_cvtph_ps(_mm512_cvtps_ph(v, _MM_FROUND_TO_NEAREST_INT | _MM_FROUND_NO_EXC));
        _mm512_mask_storeu_ps(out + i, k, v);
    }
#endif
    for (; i < n; i++) out[i] = round_half(x[i] * r * (w ? w[i] : 1.0f));
}

/* out = round_half(x * rsqrt(mean(x²) + eps) * w): the norm and the rounding of the next product's input. */
static void rms_norm_rounded(const float *x, const float *w, float eps, int32_t d, float *out) {
    const float ss = dot(x, x, d), r = 1.0f / sqrtf(ss / (float)d + eps);
    round_scaled(x, w, r, d, out);
}

/* Rotate each kept pair (i, i + p) of the w = 2p values at x by the angle whose cosine and sine are c[i], s[i]
 * (model.rotate); out may be x. */
static void rotate(const float *x, const float *c, const float *s, int32_t w, float *out) {
    const int32_t p = w / 2;
    for (int32_t i = 0; i < p; i++) {
        const float x1 = x[i], x2 = x[i + p];
        out[i] = x1 * c[i] - x2 * s[i];
        out[i + p] = x2 * c[i] + x1 * s[i];
    }
}

/* out = a projection of x: one matrix, or a factor pair through tmp (second->w NULL: one). */
static void projection(const Mat *first, const Mat *second, const float *x, float *tmp, float *out, int phase) {
    if (second->w) {
        gemv(first, x, tmp);
        MARK(phase, MAT_BYTES(first));
        gemv(second, tmp, out);
        MARK(phase + 1, MAT_BYTES(second));
    } else {
        gemv(first, x, out);
        MARK(phase, MAT_BYTES(first));
    }
}

/* The projections of a shared input: first product into t, then each part's second matrix, if any, into
 * its own buffer; part i's output is written to out[i]. */
static void shared_input(const Mat *first, const int32_t *sizes, const Mat *second, int parts, const float *x,
                         float *t, float **bufs, const float **out) {
    gemv(first, x, t);
    MARK(P_QKV, MAT_BYTES(first));
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
    double bytes = 0;
    for (int i = 0; i < n; i++) bytes += MAT_BYTES(mts[i]);
    MARK(P_QKV2, bytes);
    (void)bytes;
}

/* The attention of every query head, its output rounded into this thread's y (the o product's input). The
 * work units are (key/value group, chunk of CHUNK cached positions); a unit computes, for the group's query
 * heads, the chunk's largest score, Σ e^(score - largest) and the values weighted by those into `part`. The
 * unit holding `pos` first writes the group's new key (rotated) and value into the cache; no other unit
 * reads that position. After the barrier every thread merges the chunks in order (softmax of the whole row). */
static void attention(const Model *m, const Layer *L, const float *q, const float *k, const float *v,
                      int32_t pos, float *scores, float *part, const float *cs, float *own_q, float *y) {
    const int32_t g = m->kv_heads, rep = m->heads / m->kv_heads, wq = L->w_qk, wv = L->w_vo, T = L->cache_len;
    const int32_t p = wq / 2, chunks = pos / CHUNK + 1, stride = 2 + wv;
    const float *sn = cs + g * p;
    if (L->inv_freq) {  /* every query head rotated, on every thread */
        for (int32_t hd = 0; hd < m->heads; hd++) {
            const int32_t j = hd / rep;
            rotate(q + (size_t)hd * wq, cs + (size_t)j * p, sn + (size_t)j * p, wq, own_q + (size_t)hd * wq);
        }
    } else {
        memcpy(own_q, q, sizeof(float) * m->heads * wq);
    }
    #pragma omp for schedule(static)
    for (int32_t u = 0; u < g * chunks; u++) {
        const int32_t j = u / chunks, c = u % chunks, lo = c * CHUNK, hi = c == chunks - 1 ? pos + 1 : lo + CHUNK;
        float *kc = L->k_cache + (size_t)j * T * wq, *vc = L->v_cache + (size_t)j * T * wv;
        if (c == chunks - 1) {  /* the new key and value */
            if (L->inv_freq) {
                rotate(k + (size_t)j * wq, cs + (size_t)j * p, sn + (size_t)j * p, wq, kc + (size_t)pos * wq);
            } else {
                memcpy(kc + (size_t)pos * wq, k + (size_t)j * wq, sizeof(float) * wq);
            }
            memcpy(vc + (size_t)pos * wv, v + (size_t)j * wv, sizeof(float) * wv);
        }
        for (int32_t t = lo; t < hi; t++) {  /* each key row once, for all the group's query heads */
            prefetch_row(kc + (size_t)(t + 8 < hi ? t + 8 : t) * wq, wq);  /* keys 8 rows on, values now */
            prefetch_row(vc + (size_t)t * wv, wv);
            for (int32_t r = 0; r < rep; r++)
                scores[(size_t)(j * rep + r) * T + t] = dot(own_q + (size_t)(j * rep + r) * wq, kc + (size_t)t * wq, wq);
        }
        for (int32_t r = 0; r < rep; r++) {
            const int32_t hd = j * rep + r;
            float *sc = scores + (size_t)hd * T, mx = -INFINITY;
            for (int32_t t = lo; t < hi; t++) {
                sc[t] *= m->scale;
                mx = sc[t] > mx ? sc[t] : mx;
            }
            float *out = part + ((size_t)hd * chunks + c) * stride;
            out[0] = mx, out[1] = exp_shifted(sc + lo, hi - lo, mx);
            weighted_rows(out + 2, sc + lo, vc + (size_t)lo * wv, hi - lo, wv);
        }
    }
    MARK(P_ATTN, 4.0 * g * (pos + 1) * (wq + wv));
    for (int32_t hd = 0; hd < m->heads; hd++) {  /* the merge, in chunk order (the same for any threads) */
        const float *ph = part + (size_t)hd * chunks * stride;
        float mx = -INFINITY, z = 0.f, *yh = y + (size_t)hd * wv;
        for (int32_t c = 0; c < chunks; c++) mx = ph[c * stride] > mx ? ph[c * stride] : mx;
        for (int32_t i = 0; i < wv; i++) yh[i] = 0.f;
        for (int32_t c = 0; c < chunks; c++) {
            const float w = expf(ph[c * stride] - mx);
            z += w * ph[c * stride + 1];
            axpy(yh, w, ph + c * stride + 2, wv);
        }
        round_scaled(yh, NULL, 1.0f / z, wv, yh);
    }
    MARK(P_MERGE, 0);
}

/* f = round_half(silu(gate) · up) of the feed-forward, the down product's input. A part with a matrix in
 * mats[i] is computed here into outs[i] (a dense pair: both are row ranges of `first`; a factor pair's part:
 * its second matrix); a part without one (NULL) is already in outs[i] (the first product's output). Each
 * thread takes an equal share (± 1) of the 16-row chunks, contiguous, and reads its
 * gate rows, then its up rows, as two long streams, then writes their f: no barrier between. */
static void gated(const Mat *const *mats, const float *const *xs, float *const *outs, int32_t n, float *f) {
    const int32_t chunks = (n + 15) / 16, nt = omp_get_num_threads(), tid = omp_get_thread_num();
    const int32_t j0 = 16 * (int32_t)((int64_t)chunks * tid / nt), end = 16 * (int32_t)((int64_t)chunks * (tid + 1) / nt);
    const int32_t j1 = end < n ? end : n;
    for (int i = 0; i < 2; i++)
        if (mats[i])
            for (int32_t b = j0 / 4; b < (j1 + 3) / 4; b++) gemv_block(mats[i], xs[i], outs[i], b);
    const float *gt = outs[0], *up = outs[1];
    int32_t j = j0;
#ifdef WIDE
    for (; j < j1; j += 16) {
        const __mmask16 k = lanes(j1 - j);
        const __m512 a = _mm512_maskz_loadu_ps(k, gt + j), u = _mm512_maskz_loadu_ps(k, up + j);
        const __m512 e = exp16(_mm512_sub_ps(_mm512_setzero_ps(), a));
        const __m512 v = _mm512_mul_ps(_mm512_div_ps(a, _mm512_add_ps(_mm512_set1_ps(1.f), e)), u);
        const __m512 r = _mm512_cvtph_ps(_mm512_cvtps_ph(v, _MM_FROUND_TO_NEAREST_INT | _MM_FROUND_NO_EXC));
        _mm512_mask_storeu_ps(f + j, k, r);
    }
#else
    for (; j < j1; j++) f[j] = round_half(gt[j] / (1.0f + expf(-gt[j])) * up[j]);
#endif
    #pragma omp barrier
    MARK(P_GATED, (mats[0] ? MAT_BYTES(mats[0]) : 0) + (mats[1] ? MAT_BYTES(mats[1]) : 0));
}

/* The logits (vocab,) of `token` at position `pos`; keys and values of every layer written at pos. */
void decode_step(const Model *m, int32_t token, int32_t pos, float *logits) {
    const int32_t d = m->d, W = m->width;
    float *t = m->work, *b0 = t + W, *b1 = b0 + W, *b2 = b1 + W, *scores = b2 + W, *f = scores + W;
    const int32_t chunks = (m->layers[0].cache_len + CHUNK - 1) / CHUNK;
    float *gbuf = f + W, *part = gbuf + W, *angles = part + (size_t)m->heads * chunks * (2 + m->w_vo);
    float *own0 = part + m->part;
    const int threads = m->threads < MAX_THREADS ? m->threads : MAX_THREADS;
#ifdef PROFILE
    profile_last = omp_get_wtime();
#endif
    #pragma omp parallel num_threads(threads)
    {
        float *x = own0 + (size_t)omp_get_thread_num() * m->own, *h = x + d, *y = h + d;
        float *qr = y + (size_t)m->heads * m->w_vo;
        #pragma omp for schedule(static)
        for (int32_t l = 0; l < m->n_layers; l++) {  /* the rotary angles of this position, every layer */
            const Layer *L = &m->layers[l];
            const int32_t gp = m->kv_heads * (L->w_qk / 2);
            float *cs = angles + (size_t)l * m->kv_heads * m->w_qk, *sn = cs + gp;
            for (int32_t i = 0; L->inv_freq && i < gp; i++) {
                const float a = (float)pos * L->inv_freq[i];
                cs[i] = cosf(a), sn[i] = sinf(a);  /* (one sincosf call, as the compiler merges them) */
            }
        }
        if (m->tokens_half) {
            for (int32_t i = 0; i < d; i++) x[i] = half_to_float(m->tokens_half[(size_t)token * d + i]);
        } else {
            memcpy(x, m->tokens_float + (size_t)token * d, sizeof(float) * d);
        }
        for (int32_t l = 0; l < m->n_layers; l++) {
            const Layer *L = &m->layers[l];
            const float *qkv[3];
            float *bufs[3] = {b0, b1, b2};
            if (l > 0)
                for (int32_t i = 0; i < d; i++) x[i] += b0[i];  /* the last layer's feed-forward output */
            rms_norm_rounded(x, L->attn_norm, m->eps, d, h);
            MARK(P_NORM, 0);
            shared_input(&L->qkv, L->qkv_sizes, L->qkv_second, 3, h, t, bufs, qkv);
            attention(m, L, qkv[0], qkv[1], qkv[2], pos, scores, part, angles + (size_t)l * m->kv_heads * m->w_qk,
                      qr, y);
            projection(&L->o, &L->o_second, y, b1, b0, P_O);
            for (int32_t i = 0; i < d; i++) x[i] += b0[i];
            rms_norm_rounded(x, L->ff_norm, m->eps, d, h);
            MARK(P_NORM, 0);
            const int32_t n = L->gu_second[0].w ? L->gu_second[0].rows : L->gu_sizes[0];  /* d_ff */
            const Mat *mats[2];
            const float *xs[2];
            float *outs[2];
            Mat views[2];
            if (!L->gu_second[0].w && !L->gu_second[1].w) {  /* dense: gate and up rows of `first` here */
                for (int i = 0; i < 2; i++) {
                    views[i] = L->gu;
                    views[i].rows = L->gu_sizes[i];
                    views[i].w = L->gu.w + (size_t)(i ? L->gu_sizes[0] : 0) * L->gu.cols;
                    views[i].bias = L->gu.bias ? L->gu.bias + (i ? L->gu_sizes[0] : 0) : NULL;
                    mats[i] = &views[i], xs[i] = h, outs[i] = i ? gbuf : t;
                }
            } else {
                gemv(&L->gu, h, t);
                MARK(P_GU, MAT_BYTES(&L->gu));
                for (int i = 0, off = 0; i < 2; off += L->gu_sizes[i], i++) {
                    const int has = L->gu_second[i].w != NULL;
                    mats[i] = has ? &L->gu_second[i] : NULL;
                    xs[i] = t + off;
                    outs[i] = has ? (i ? gbuf : b1) : t + off;
                }
            }
            gated(mats, xs, outs, n, f);
            projection(&L->down, &L->down_second, f, b2, b0, P_DOWN);
        }
        for (int32_t i = 0; i < d; i++) x[i] += b0[i];
        rms_norm_rounded(x, m->final_norm, m->eps, d, h);
        MARK(P_NORM, 0);
        gemv(&m->head, h, logits);
        MARK(P_HEAD, MAT_BYTES(&m->head));
    }
}
