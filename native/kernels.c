/*
 * cairn's native cohort kernels (optional): the same contracts as the WebAssembly kernels in
 * src/cohort/wasm/kernels.wat, with the vector width of the CPU (AVX-512: 8 doubles per
 * register, 32 registers; AVX2 with FMA: 4 doubles, 16 registers), chosen at load time.
 * Built by scripts/build-native.mjs with Node's headers and a C compiler; without it (or on a
 * CPU with neither AVX2+FMA nor AVX-512) the WebAssembly kernels run instead.
 *
 * They work on Float64Arrays wherever they live: ordinary arrays, or views of the shared cohort
 * arena (a WebAssembly memory) that the worker threads compute in, in place.
 *
 * Exactness: every output of the product is one fused multiply-add chain over the cohorts in
 * ascending order, started at +0 (as f64x2.relaxed_madd does in kernels.wat), so the product
 * is bit-identical to the WebAssembly kernel's wherever the engine fuses; the balance is the
 * same sequence of operations as the TypeScript and WebAssembly ones. The stock-driven solve
 * sums each year's cohorts in one ascending fused chain (the WebAssembly solve sums even and
 * odd cohorts apart, so the two differ in the last bits). Compiled with -ffp-contract=off: no
 * multiply-add is fused unless written so.
 *
 *   product(I, M, O, n, T)                     O[s, t] = Σ_{c ≤ t} I[s, c] · M[c, t]
 *   inflow(I, M, O, S, D, initOut, stock0, n, T)  outflow (+ initOut), stock and stock change
 *   solve(Z, St, init, I, A, n, T, clamp)      the stock-driven solve (see stockDrivenSolve)
 *   info()                                     { isa, l1d, l2, l3 } (cache sizes in bytes)
 * All arrays are row-major with a row stride of T (M and St: T × T); initOut, stock0 and init
 * may be null.
 */
#include <node_api.h>
#include <immintrin.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>
#include <sys/mman.h>
#include <unistd.h>

enum { ISA_NONE = 0, ISA_AVX2 = 1, ISA_AVX512 = 2 };
static int isa = -1;

static int detect(void) {
  if (isa >= 0) return isa;
  __builtin_cpu_init();
  if (__builtin_cpu_supports("avx512f")) isa = ISA_AVX512;
  else if (__builtin_cpu_supports("avx2") && __builtin_cpu_supports("fma")) isa = ISA_AVX2;
  else isa = ISA_NONE;
  const char *force = getenv("CAIRN_NATIVE_ISA"); /* for tests: avx2 on an AVX-512 machine */
  if (force && !strcmp(force, "avx2") && isa == ISA_AVX512) isa = ISA_AVX2;
  return isa;
}

#define REP6(X) X(0) X(1) X(2) X(3) X(4) X(5)
#define REP8(X) X(0) X(1) X(2) X(3) X(4) X(5) X(6) X(7)

/* ---------------- the product, AVX-512: blocks of 8 series × 16 years ---------------- */

/*
 * One block: o[r, 0..15] for rows r < rows, from ip (the block's inputs packed cohort-major,
 * 8 per cohort) and pr (M at column t0, row 0). Cohorts [0, c1) feed both vectors of years,
 * [c1, c2) only the second (the first vector's years are all < c1: M is 0 there). l0, l1:
 * valid years in each vector (8 except at the end of the horizon).
 */
__attribute__((target("avx512f"), noinline))
static void blk512(const double *ip, const double *pr, size_t T, size_t c1, size_t c2, int l0, int l1, double *o, int rows) {
#define D512(r) __m512d a##r##0 = _mm512_setzero_pd(), a##r##1 = _mm512_setzero_pd();
  REP8(D512)
#define F512B(r) { __m512d x = _mm512_set1_pd(ip[r]); a##r##0 = _mm512_fmadd_pd(x, m0, a##r##0); a##r##1 = _mm512_fmadd_pd(x, m1, a##r##1); }
#define F512S(r) { a##r##1 = _mm512_fmadd_pd(_mm512_set1_pd(ip[r]), m1, a##r##1); }
  size_t c = 0;
  if (l0 == 8 && l1 == 8) {
    for (; c < c1; c++, pr += T, ip += 8) {
      __m512d m0 = _mm512_loadu_pd(pr), m1 = _mm512_loadu_pd(pr + 8);
      REP8(F512B)
    }
    for (; c < c2; c++, pr += T, ip += 8) {
      __m512d m1 = _mm512_loadu_pd(pr + 8);
      REP8(F512S)
    }
  } else {
    /* the end of the horizon: masked loads never read past a row of M */
    __mmask8 k0 = (__mmask8)((1u << l0) - 1), k1 = (__mmask8)(l1 > 0 ? (1u << l1) - 1 : 0);
    for (; c < c1; c++, pr += T, ip += 8) {
      __m512d m0 = _mm512_maskz_loadu_pd(k0, pr), m1 = _mm512_maskz_loadu_pd(k1, pr + 8);
      REP8(F512B)
    }
    for (; c < c2; c++, pr += T, ip += 8) {
      __m512d m1 = _mm512_maskz_loadu_pd(k1, pr + 8);
      REP8(F512S)
    }
  }
  __mmask8 k0 = (__mmask8)(l0 >= 8 ? 0xff : (1u << l0) - 1), k1 = (__mmask8)(l1 >= 8 ? 0xff : l1 > 0 ? (1u << l1) - 1 : 0);
#define S512(r) if (r < rows) { _mm512_mask_storeu_pd(o + r * T, k0, a##r##0); _mm512_mask_storeu_pd(o + r * T + 8, k1, a##r##1); }
  REP8(S512)
}

/* ---------------- the product, AVX2 + FMA: blocks of 6 series × 8 years ---------------- */

__attribute__((target("avx2,fma"), noinline))
static void blk256(const double *ip, const double *pr, size_t T, size_t c1, size_t c2, int l0, int l1, double *o, int rows) {
#define D256(r) __m256d a##r##0 = _mm256_setzero_pd(), a##r##1 = _mm256_setzero_pd();
  REP6(D256)
#define F256B(r) { __m256d x = _mm256_broadcast_sd(ip + r); a##r##0 = _mm256_fmadd_pd(x, m0, a##r##0); a##r##1 = _mm256_fmadd_pd(x, m1, a##r##1); }
#define F256S(r) { a##r##1 = _mm256_fmadd_pd(_mm256_broadcast_sd(ip + r), m1, a##r##1); }
  size_t c = 0;
  if (l0 == 4 && l1 == 4) {
    for (; c < c1; c++, pr += T, ip += 6) {
      __m256d m0 = _mm256_loadu_pd(pr), m1 = _mm256_loadu_pd(pr + 4);
      REP6(F256B)
    }
    for (; c < c2; c++, pr += T, ip += 6) {
      __m256d m1 = _mm256_loadu_pd(pr + 4);
      REP6(F256S)
    }
  } else {
    const __m256i lane = _mm256_setr_epi64x(0, 1, 2, 3);
    const __m256i q0 = _mm256_cmpgt_epi64(_mm256_set1_epi64x(l0), lane), q1 = _mm256_cmpgt_epi64(_mm256_set1_epi64x(l1), lane);
    for (; c < c1; c++, pr += T, ip += 6) {
      __m256d m0 = _mm256_maskload_pd(pr, q0), m1 = _mm256_maskload_pd(pr + 4, q1);
      REP6(F256B)
    }
    for (; c < c2; c++, pr += T, ip += 6) {
      __m256d m1 = _mm256_maskload_pd(pr + 4, q1);
      REP6(F256S)
    }
  }
  const __m256i lane = _mm256_setr_epi64x(0, 1, 2, 3);
  const __m256i q0 = _mm256_cmpgt_epi64(_mm256_set1_epi64x(l0), lane), q1 = _mm256_cmpgt_epi64(_mm256_set1_epi64x(l1), lane);
#define S256(r) if (r < rows) { _mm256_maskstore_pd(o + r * T, q0, a##r##0); _mm256_maskstore_pd(o + r * T + 4, q1, a##r##1); }
  REP6(S256)
}

/* Rows s0 .. s0 + rows of I (n × T), packed cohort-major: pack[c·R + r]; missing rows are 0. */
static void pack_rows(double *pack, const double *I, size_t s0, int rows, int R, size_t T) {
  for (size_t c = 0; c < T; c++)
    for (int r = 0; r < R; r++) pack[c * R + r] = r < rows ? I[(s0 + r) * T + c] : 0.0;
}

/* The product for the block of rows s0 .. s0 + rows (already packed). */
static void product_block(const double *pack, const double *M, double *O, size_t s0, int rows, size_t T) {
  if (isa == ISA_AVX512) {
    for (size_t t0 = 0; t0 < T; t0 += 16) {
      long left = (long)(T - t0);
      int l0 = left >= 8 ? 8 : (int)left, l1 = left >= 16 ? 8 : left > 8 ? (int)(left - 8) : 0;
      size_t c1 = t0 + 8 < T ? t0 + 8 : T, c2 = t0 + 16 < T ? t0 + 16 : T;
      blk512(pack, M + t0, T, c1, c2, l0, l1, O + s0 * T + t0, rows);
    }
  } else {
    for (size_t t0 = 0; t0 < T; t0 += 8) {
      long left = (long)(T - t0);
      int l0 = left >= 4 ? 4 : (int)left, l1 = left >= 8 ? 4 : left > 4 ? (int)(left - 4) : 0;
      size_t c1 = t0 + 4 < T ? t0 + 4 : T, c2 = t0 + 8 < T ? t0 + 8 : T;
      blk256(pack, M + t0, T, c1, c2, l0, l1, O + s0 * T + t0, rows);
    }
  }
}

static int block_rows(void) { return isa == ISA_AVX512 ? 8 : 6; }

/* A pack for R rows of T cohorts, 64-byte aligned, with zeros up to the next multiple of 8 cohorts. */
static double *pack_buffer(int R, size_t T) {
  size_t len = ((T + 7) / 8 * 8) * (size_t)R;
  double *p = aligned_alloc(64, (len * sizeof(double) + 63) / 64 * 64);
  if (p) memset(p, 0, len * sizeof(double));
  return p;
}

static int run_product(const double *I, const double *M, double *O, size_t n, size_t T) {
  int R = block_rows();
  double *pack = pack_buffer(R, T);
  if (!pack) return 0;
  for (size_t s0 = 0; s0 < n; s0 += R) {
    int rows = n - s0 < (size_t)R ? (int)(n - s0) : R;
    pack_rows(pack, I, s0, rows, R, T);
    product_block(pack, M, O, s0, rows, T);
  }
  free(pack);
  return 1;
}

/*
 * The balance of a block of R rows (R = 8 or 6, a compile-time constant so that each row's
 * running stock stays in a register): the rows' chains interleaved, so that R independent
 * additions are in flight. Rows beyond `rows` read and write a scratch row.
 *   O += initOut; S[t] = (S[t − 1] + I[t]) − O[t]; D[t] = S[t] − S[t − 1]; S[−1] = stock0 (or 0).
 */
#define BALANCE_BLOCK(NAME, R, REP)                                                                                  \
  static void NAME(const double *pack, double *O, double *S, double *D, const double *initOut, const double *stock0, \
                   size_t s0, int rows, size_t T, double *scratch) {                                               \
    double *o_[R], *s_[R], *d_[R];                                                                                 \
    const double *io_[R];                                                                                          \
    for (int r = 0; r < R; r++) {                                                                                  \
      int real = r < rows;                                                                                         \
      o_[r] = real ? O + (s0 + r) * T : scratch;                                                                   \
      s_[r] = real ? S + (s0 + r) * T : scratch + T;                                                               \
      d_[r] = real ? D + (s0 + r) * T : scratch + 2 * T;                                                           \
      io_[r] = initOut && real ? initOut + (s0 + r) * T : scratch + 3 * T;                                         \
    }                                                                                                              \
    _Pragma("GCC diagnostic push") _Pragma("GCC diagnostic ignored \"-Wunused-variable\"")                         \
    REP(BDECL)                                                                                                     \
    _Pragma("GCC diagnostic pop")                                                                                  \
    if (initOut)                                                                                                   \
      for (size_t t = 0; t < T; t++, pack += R) { REP(BSTEP_INIT) }                                                \
    else                                                                                                           \
      for (size_t t = 0; t < T; t++, pack += R) { REP(BSTEP) }                                                     \
  }
#define BDECL(r) double p##r = r < rows && stock0 ? stock0[s0 + r] : 0.0; double *or##r = o_[r], *sr##r = s_[r], *dr##r = d_[r]; const double *ir##r = io_[r];
#define BSTEP(r) { double o = or##r[t]; double v = (p##r + pack[r]) - o; sr##r[t] = v; dr##r[t] = v - p##r; p##r = v; }
#define BSTEP_INIT(r) { double o = or##r[t] + ir##r[t]; or##r[t] = o; double v = (p##r + pack[r]) - o; sr##r[t] = v; dr##r[t] = v - p##r; p##r = v; }
BALANCE_BLOCK(balance8, 8, REP8)
BALANCE_BLOCK(balance6, 6, REP6)

/* Transposes the 8 × 8 block x[0..7] (rows) in place, in 24 shuffles. */
__attribute__((target("avx512f"), always_inline))
static inline void tr8(__m512d *x) {
  __m512d t0 = _mm512_unpacklo_pd(x[0], x[1]), t1 = _mm512_unpackhi_pd(x[0], x[1]);
  __m512d t2 = _mm512_unpacklo_pd(x[2], x[3]), t3 = _mm512_unpackhi_pd(x[2], x[3]);
  __m512d t4 = _mm512_unpacklo_pd(x[4], x[5]), t5 = _mm512_unpackhi_pd(x[4], x[5]);
  __m512d t6 = _mm512_unpacklo_pd(x[6], x[7]), t7 = _mm512_unpackhi_pd(x[6], x[7]);
  __m512d u0 = _mm512_shuffle_f64x2(t0, t2, 0x88), u1 = _mm512_shuffle_f64x2(t0, t2, 0xDD);
  __m512d u2 = _mm512_shuffle_f64x2(t1, t3, 0x88), u3 = _mm512_shuffle_f64x2(t1, t3, 0xDD);
  __m512d u4 = _mm512_shuffle_f64x2(t4, t6, 0x88), u5 = _mm512_shuffle_f64x2(t4, t6, 0xDD);
  __m512d u6 = _mm512_shuffle_f64x2(t5, t7, 0x88), u7 = _mm512_shuffle_f64x2(t5, t7, 0xDD);
  x[0] = _mm512_shuffle_f64x2(u0, u4, 0x88);
  x[4] = _mm512_shuffle_f64x2(u0, u4, 0xDD);
  x[2] = _mm512_shuffle_f64x2(u1, u5, 0x88);
  x[6] = _mm512_shuffle_f64x2(u1, u5, 0xDD);
  x[1] = _mm512_shuffle_f64x2(u2, u6, 0x88);
  x[5] = _mm512_shuffle_f64x2(u2, u6, 0xDD);
  x[3] = _mm512_shuffle_f64x2(u3, u7, 0x88);
  x[7] = _mm512_shuffle_f64x2(u3, u7, 0xDD);
}

/*
 * The balance of a block of 8 rows with AVX-512: 8 years at a time, the outflow block
 * transposed so that one vector holds a year of all 8 rows; each lane then does the scalar
 * balance's own operations in its order (bit-identical), and the stock and stock change are
 * transposed back into their rows. Rows beyond `rows` are zeros and are not stored.
 */
__attribute__((target("avx512f"), noinline))
static void balance512(const double *pack, double *O, double *S, double *D, const double *initOut, const double *stock0, size_t s0, int rows, size_t T) {
  double p0[8] = { 0 };
  for (int r = 0; r < rows; r++) p0[r] = stock0 ? stock0[s0 + r] : 0.0;
  __m512d prev = _mm512_loadu_pd(p0);
  for (size_t t0 = 0; t0 < T; t0 += 8) {
    __mmask8 k = (__mmask8)(T - t0 >= 8 ? 0xff : (1u << (T - t0)) - 1);
    __m512d x[8], sv[8], dv[8];
    for (int r = 0; r < 8; r++) {
      if (r < rows) {
        double *o = O + (s0 + r) * T + t0;
        x[r] = _mm512_maskz_loadu_pd(k, o);
        if (initOut) {
          x[r] = _mm512_add_pd(x[r], _mm512_maskz_loadu_pd(k, initOut + (s0 + r) * T + t0));
          _mm512_mask_storeu_pd(o, k, x[r]);
        }
      } else x[r] = _mm512_setzero_pd();
    }
    tr8(x);
    for (int j = 0; j < 8; j++) {
      __m512d v = _mm512_sub_pd(_mm512_add_pd(prev, _mm512_load_pd(pack + (t0 + j) * 8)), x[j]);
      sv[j] = v;
      dv[j] = _mm512_sub_pd(v, prev);
      prev = v;
    }
    tr8(sv);
    tr8(dv);
    for (int r = 0; r < rows; r++) {
      _mm512_mask_storeu_pd(S + (s0 + r) * T + t0, k, sv[r]);
      _mm512_mask_storeu_pd(D + (s0 + r) * T + t0, k, dv[r]);
    }
  }
}

/* The inflow-driven model: per block of rows, the product, then their balance while the rows are in cache. */
static int run_inflow(const double *I, const double *M, double *O, double *S, double *D, const double *initOut, const double *stock0, size_t n, size_t T) {
  int R = block_rows();
  double *pack = pack_buffer(R, T);
  double *scratch = calloc(4 * T, sizeof(double));
  if (!pack || !scratch) {
    free(pack);
    free(scratch);
    return 0;
  }
  for (size_t s0 = 0; s0 < n; s0 += R) {
    int rows = n - s0 < (size_t)R ? (int)(n - s0) : R;
    pack_rows(pack, I, s0, rows, R, T);
    product_block(pack, M, O, s0, rows, T);
    if (isa == ISA_AVX512) balance512(pack, O, S, D, initOut, stock0, s0, rows, T);
    else if (R == 8) balance8(pack, O, S, D, initOut, stock0, s0, rows, T, scratch);
    else balance6(pack, O, S, D, initOut, stock0, s0, rows, T, scratch);
  }
  free(pack);
  free(scratch);
  return 1;
}

/* ---------------- the stock-driven solve ---------------- */

/*
 * Per block of series (16 with AVX-512, 8 with AVX2, as two vectors across series), years in
 * passes of 4: the cohorts before the pass feed the 4 years' 8 accumulators at once; then year
 * by year the cohorts inside the pass, in ascending order, and the year's inflow
 *   I[t] = (Z[t] − Σ_{c<t} I[c]·St[t, c] − init[t]) / St[t, t]   (clamp: a negative I is 0)
 *   A[t] = (Σ … + init[t]) + I[t]·St[t, t]
 * Z, init, I and A are packed cohort-major (pack[t·B + j]) for the block and unpacked at the end.
 */
#define SOLVE_BODY(VT, W, SET1, LOAD, STORE, FMA, ADD, SUB, MUL, DIV, ZERO, CLAMP)                                  \
  {                                                                                                                \
    const size_t B = 2 * W;                                                                                        \
    for (size_t s0 = 0; s0 < n; s0 += B) {                                                                         \
      size_t rows = n - s0 < B ? n - s0 : B;                                                                       \
      for (size_t t = 0; t < T; t++)                                                                               \
        for (size_t j = 0; j < B; j++) {                                                                           \
          zp[t * B + j] = j < rows ? Z[(s0 + j) * T + t] : 0.0;                                                    \
          if (init) ep[t * B + j] = j < rows ? init[(s0 + j) * T + t] : 0.0;                                       \
        }                                                                                                          \
      for (size_t t0 = 0; t0 < T; t0 += 4) {                                                                       \
        size_t y = T - t0 < 4 ? T - t0 : 4;                                                                        \
        const double *r0 = St + t0 * T, *r1 = St + (t0 + (y > 1)) * T, *r2 = St + (t0 + 2 * (y > 2)) * T, *r3 = St + (t0 + 3 * (y > 3)) * T; \
        VT a00 = ZERO, a01 = ZERO, a10 = ZERO, a11 = ZERO, a20 = ZERO, a21 = ZERO, a30 = ZERO, a31 = ZERO;         \
        const double *q = ip;                                                                                      \
        for (size_t c = 0; c < t0; c++, q += B) {                                                                  \
          VT x0 = LOAD(q), x1 = LOAD(q + W), m;                                                                    \
          m = SET1(r0[c]); a00 = FMA(x0, m, a00); a01 = FMA(x1, m, a01);                                           \
          m = SET1(r1[c]); a10 = FMA(x0, m, a10); a11 = FMA(x1, m, a11);                                           \
          m = SET1(r2[c]); a20 = FMA(x0, m, a20); a21 = FMA(x1, m, a21);                                           \
          m = SET1(r3[c]); a30 = FMA(x0, m, a30); a31 = FMA(x1, m, a31);                                           \
        }                                                                                                          \
        VT acc[8] = { a00, a01, a10, a11, a20, a21, a30, a31 };                                                    \
        for (size_t j = 0; j < y; j++) {                                                                           \
          size_t t = t0 + j;                                                                                       \
          const double *row = St + t * T;                                                                          \
          VT b0 = acc[2 * j], b1 = acc[2 * j + 1];                                                                 \
          for (size_t c = t0; c < t; c++) {                                                                        \
            VT m = SET1(row[c]);                                                                                   \
            b0 = FMA(LOAD(ip + c * B), m, b0);                                                                     \
            b1 = FMA(LOAD(ip + c * B + W), m, b1);                                                                 \
          }                                                                                                        \
          if (init) { b0 = ADD(b0, LOAD(ep + t * B)); b1 = ADD(b1, LOAD(ep + t * B + W)); }                        \
          VT d = SET1(row[t]);                                                                                     \
          VT x0 = DIV(SUB(LOAD(zp + t * B), b0), d), x1 = DIV(SUB(LOAD(zp + t * B + W), b1), d);                   \
          if (clamp) { x0 = CLAMP(x0); x1 = CLAMP(x1); }                                                           \
          STORE(ip + t * B, x0); STORE(ip + t * B + W, x1);                                                        \
          STORE(ap + t * B, ADD(b0, MUL(x0, d))); STORE(ap + t * B + W, ADD(b1, MUL(x1, d)));                      \
        }                                                                                                          \
      }                                                                                                            \
      for (size_t j = 0; j < rows; j++)                                                                            \
        for (size_t t = 0; t < T; t++) {                                                                           \
          I[(s0 + j) * T + t] = ip[t * B + j];                                                                     \
          A[(s0 + j) * T + t] = ap[t * B + j];                                                                     \
        }                                                                                                          \
    }                                                                                                              \
  }

#define CLAMP512(x) _mm512_mask_blend_pd(_mm512_cmp_pd_mask(x, _mm512_setzero_pd(), _CMP_LT_OQ), x, _mm512_setzero_pd())
__attribute__((target("avx512f")))
static void solve512(const double *Z, const double *St, const double *init, double *I, double *A, size_t n, size_t T, int clamp, double *zp, double *ep, double *ip, double *ap)
SOLVE_BODY(__m512d, 8, _mm512_set1_pd, _mm512_load_pd, _mm512_store_pd, _mm512_fmadd_pd, _mm512_add_pd, _mm512_sub_pd, _mm512_mul_pd, _mm512_div_pd, _mm512_setzero_pd(), CLAMP512)

#define CLAMP256(x) _mm256_blendv_pd(x, _mm256_setzero_pd(), _mm256_cmp_pd(x, _mm256_setzero_pd(), _CMP_LT_OQ))
__attribute__((target("avx2,fma")))
static void solve256(const double *Z, const double *St, const double *init, double *I, double *A, size_t n, size_t T, int clamp, double *zp, double *ep, double *ip, double *ap)
SOLVE_BODY(__m256d, 4, _mm256_set1_pd, _mm256_load_pd, _mm256_store_pd, _mm256_fmadd_pd, _mm256_add_pd, _mm256_sub_pd, _mm256_mul_pd, _mm256_div_pd, _mm256_setzero_pd(), CLAMP256)

static int run_solve(const double *Z, const double *St, const double *init, double *I, double *A, size_t n, size_t T, int clamp) {
  size_t B = isa == ISA_AVX512 ? 16 : 8;
  size_t bytes = (T * B * sizeof(double) + 63) / 64 * 64;
  double *buf = aligned_alloc(64, 4 * bytes);
  if (!buf) return 0;
  double *zp = buf, *ep = buf + bytes / 8, *ip = buf + 2 * bytes / 8, *ap = buf + 3 * bytes / 8;
  if (isa == ISA_AVX512) solve512(Z, St, init, I, A, n, T, clamp, zp, ep, ip, ap);
  else solve256(Z, St, init, I, A, n, T, clamp, zp, ep, ip, ap);
  free(buf);
  return 1;
}

/* ---------------- N-API ---------------- */

static napi_value fail(napi_env env, const char *msg) {
  napi_throw_error(env, NULL, msg);
  return NULL;
}

/* A Float64Array argument (or null when `optional`) with at least `need` elements. */
static int f64(napi_env env, napi_value v, size_t need, int optional, double **out, const char **err) {
  napi_valuetype vt;
  napi_typeof(env, v, &vt);
  if (optional && (vt == napi_null || vt == napi_undefined)) {
    *out = NULL;
    return 1;
  }
  bool is = false;
  napi_is_typedarray(env, v, &is);
  if (!is) { *err = "expected a Float64Array"; return 0; }
  napi_typedarray_type type;
  size_t len, off;
  void *data;
  napi_value ab;
  if (napi_get_typedarray_info(env, v, &type, &len, &data, &ab, &off) != napi_ok || type != napi_float64_array) { *err = "expected a Float64Array"; return 0; }
  if (len < need) { *err = "an array is shorter than n × T (or T × T)"; return 0; }
  *out = (double *)data;
  return 1;
}

static int count(napi_env env, napi_value v, size_t *out) {
  double d;
  if (napi_get_value_double(env, v, &d) != napi_ok || !(d >= 0) || d > 1e15 || d != (double)(size_t)d) return 0;
  *out = (size_t)d;
  return 1;
}

#define ARGS(N)                                                   \
  size_t argc = N;                                                \
  napi_value argv[N];                                             \
  napi_get_cb_info(env, info, &argc, argv, NULL, NULL);           \
  if (argc < N) return fail(env, "cairn kernels: too few arguments"); \
  const char *err = "bad argument";

/* product(I, M, O, n, T) */
static napi_value js_product(napi_env env, napi_callback_info info) {
  ARGS(5)
  size_t n, T;
  double *I, *M, *O;
  if (!count(env, argv[3], &n) || !count(env, argv[4], &T)) return fail(env, "cairn kernels: n and T must be whole numbers");
  if (!f64(env, argv[0], n * T, 0, &I, &err) || !f64(env, argv[1], T * T, 0, &M, &err) || !f64(env, argv[2], n * T, 0, &O, &err)) return fail(env, err);
  if (n && T && !run_product(I, M, O, n, T)) return fail(env, "cairn kernels: out of memory");
  return NULL;
}

/* inflow(I, M, O, S, D, initOut, stock0, n, T) */
static napi_value js_inflow(napi_env env, napi_callback_info info) {
  ARGS(9)
  size_t n, T;
  double *I, *M, *O, *S, *D, *io, *s0;
  if (!count(env, argv[7], &n) || !count(env, argv[8], &T)) return fail(env, "cairn kernels: n and T must be whole numbers");
  if (!f64(env, argv[0], n * T, 0, &I, &err) || !f64(env, argv[1], T * T, 0, &M, &err) || !f64(env, argv[2], n * T, 0, &O, &err) ||
      !f64(env, argv[3], n * T, 0, &S, &err) || !f64(env, argv[4], n * T, 0, &D, &err) || !f64(env, argv[5], n * T, 1, &io, &err) ||
      !f64(env, argv[6], n, 1, &s0, &err))
    return fail(env, err);
  if (n && T && !run_inflow(I, M, O, S, D, io, s0, n, T)) return fail(env, "cairn kernels: out of memory");
  return NULL;
}

/* solve(Z, St, init, I, A, n, T, clamp) */
static napi_value js_solve(napi_env env, napi_callback_info info) {
  ARGS(8)
  size_t n, T;
  double *Z, *St, *init, *I, *A;
  bool clamp = false;
  if (!count(env, argv[5], &n) || !count(env, argv[6], &T)) return fail(env, "cairn kernels: n and T must be whole numbers");
  if (!f64(env, argv[0], n * T, 0, &Z, &err) || !f64(env, argv[1], T * T, 0, &St, &err) || !f64(env, argv[2], n * T, 1, &init, &err) ||
      !f64(env, argv[3], n * T, 0, &I, &err) || !f64(env, argv[4], n * T, 0, &A, &err))
    return fail(env, err);
  napi_get_value_bool(env, argv[7], &clamp);
  if (n && T && !run_solve(Z, St, init, I, A, n, T, clamp)) return fail(env, "cairn kernels: out of memory");
  return NULL;
}

/*
 * adviseHugePages(array): asks the kernel to back the array's whole 2 MiB pages with
 * transparent huge pages (madvise MADV_HUGEPAGE; Linux, where the system leaves it to
 * madvise). Call it before the first write: one fault then maps 2 MiB instead of 4 KiB, and on
 * hosts where a page fault is dear (virtual machines) the first touch of a large array gets many
 * times cheaper. Returns the bytes advised (0 where nothing could be).
 */
static napi_value js_advise_huge(napi_env env, napi_callback_info info) {
  size_t argc = 1;
  napi_value argv[1], out;
  napi_get_cb_info(env, info, &argc, argv, NULL, NULL);
  double advised = 0;
  bool is = false;
  if (argc >= 1 && napi_is_typedarray(env, argv[0], &is) == napi_ok && is) {
    napi_typedarray_type type;
    size_t len, off;
    void *data;
    napi_value ab;
    if (napi_get_typedarray_info(env, argv[0], &type, &len, &data, &ab, &off) == napi_ok && data) {
      size_t el = type == napi_float64_array || type == napi_bigint64_array || type == napi_biguint64_array ? 8 : type == napi_int32_array || type == napi_uint32_array || type == napi_float32_array ? 4 : type == napi_int16_array || type == napi_uint16_array ? 2 : 1;
#ifdef MADV_HUGEPAGE
      const uintptr_t H = (uintptr_t)2 << 20;
      uintptr_t a = ((uintptr_t)data + H - 1) & ~(H - 1), b = ((uintptr_t)data + len * el) & ~(H - 1);
      if (b > a && madvise((void *)a, b - a, MADV_HUGEPAGE) == 0) advised = (double)(b - a);
#endif
    }
  }
  napi_create_double(env, advised, &out);
  return out;
}

static napi_value js_info(napi_env env, napi_callback_info info) {
  (void)info;
  napi_value o, v;
  napi_create_object(env, &o);
  const char *names[] = { "none", "avx2", "avx512" };
  napi_create_string_utf8(env, names[detect()], NAPI_AUTO_LENGTH, &v);
  napi_set_named_property(env, o, "isa", v);
  long sizes[3] = { -1, -1, -1 };
#ifdef _SC_LEVEL1_DCACHE_SIZE
  sizes[0] = sysconf(_SC_LEVEL1_DCACHE_SIZE);
  sizes[1] = sysconf(_SC_LEVEL2_CACHE_SIZE);
  sizes[2] = sysconf(_SC_LEVEL3_CACHE_SIZE);
#endif
  const char *keys[] = { "l1d", "l2", "l3" };
  for (int i = 0; i < 3; i++) {
    napi_create_double(env, sizes[i] > 0 ? (double)sizes[i] : 0, &v);
    napi_set_named_property(env, o, keys[i], v);
  }
  return o;
}

NAPI_MODULE_INIT(/* napi_env env, napi_value exports */) {
  detect();
  napi_value fn;
  napi_create_function(env, "product", NAPI_AUTO_LENGTH, js_product, NULL, &fn);
  napi_set_named_property(env, exports, "product", fn);
  napi_create_function(env, "inflow", NAPI_AUTO_LENGTH, js_inflow, NULL, &fn);
  napi_set_named_property(env, exports, "inflow", fn);
  napi_create_function(env, "solve", NAPI_AUTO_LENGTH, js_solve, NULL, &fn);
  napi_set_named_property(env, exports, "solve", fn);
  napi_create_function(env, "info", NAPI_AUTO_LENGTH, js_info, NULL, &fn);
  napi_set_named_property(env, exports, "info", fn);
  napi_create_function(env, "adviseHugePages", NAPI_AUTO_LENGTH, js_advise_huge, NULL, &fn);
  napi_set_named_property(env, exports, "adviseHugePages", fn);
  return exports;
}
