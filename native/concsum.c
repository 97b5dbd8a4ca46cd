/*
 * Concordance sums without a join: the exact partial sums of a long flow table mapped through a
 * concordance (src/ops/concordance-map.ts, applyConcordance), computed on DuckDB's own worker
 * threads by a scalar function registered for the job. DuckDB joins every input row to each of
 * its commodity's concordance rows (2.6 × 10^8 joined rows at the L bench set) and groups them
 * by text keys: 21 s here. This sink takes each input row once, with small integer ids for its
 * group keys, commodity, year and kind, walks its commodity's concordance rows in an array and
 * adds to dense per-thread cells; the cells of all threads are added up at the end. Every sum is
 * of whole resolution units (64-bit terms, 128-bit sums), so the order of the additions does
 * not matter and the result is the one the SQL gives, to the unit.
 *
 * Per input row (gid, cid, year offset, kind, value, units, nomass, flag), as the SQL:
 *   cid NULL (a row that cannot be mapped): one row in the cell of concordance key "none":
 *     in += units, unmapped += units (unless nomass); unmappedRows += 1.
 *   else, for each concordance row j of cid (key ck, factor f, share s, first):
 *     mapped += units((value · f) · s) if value is not NULL, distributed += units((value or 0) · s),
 *     in += units if first (and not nomass), flag or'ed, mappedRows += 1.
 *   where units(x) = CAST(round(x · scale) AS BIGINT): C's round (half away from zero) and the
 *   same double products in the same order (built with -ffp-contract=off: no fused multiply-add).
 * A product that is not finite or does not fit in 64 bits is counted (invalid) instead: the
 * caller then runs the SQL, which reports it as DuckDB does. So are sums that leave 64 bits.
 */
#include <math.h>
#include <node_api.h>
#include <pthread.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include "common.h"

typedef struct {
  __int128 m, d, in, un;
  int64_t nm, mappedRows, unmappedRows, rows;
  int32_t nflag, flag;
} cell;

#define MAXLOCALS 64

typedef struct job {
  uint64_t id;
  duckdb_database db;
  char *sql;
  int32_t groups, cks, years, kinds, ncom;
  double scale;
  int32_t *cstart, *ck, *first; /* concordance rows of commodity c: cstart[c] .. cstart[c+1] */
  double *factor, *share;
  size_t cells;
  pthread_mutex_t mu;
  cell *locals[MAXLOCALS];
  int nlocals;
  uint64_t invalid;
  char error[1024];
  /* results: the cells that received rows */
  size_t n;
  int32_t *out_i32;  /* gid, ck (-1: none), year offset, kind, mapped non-null count>0, flag (-1 NULL) */
  int64_t *out_i64;  /* m, d, in, un, mappedRows, unmappedRows */
  napi_deferred deferred;
  napi_async_work work;
  napi_ref refs[5];
} job;

static uint64_t jobCounter;
static __thread uint64_t tlsJob;
static __thread cell *tlsCells;

static cell *attach(job *j) {
  cell *c = calloc(j->cells, sizeof *c);
  if (!c) return NULL;
  pthread_mutex_lock(&j->mu);
  bool ok = j->nlocals < MAXLOCALS;
  if (ok) j->locals[j->nlocals++] = c;
  pthread_mutex_unlock(&j->mu);
  if (!ok) {
    free(c);
    return NULL;
  }
  tlsJob = j->id;
  tlsCells = c;
  return c;
}

static inline bool valid(const uint64_t *mask, idx_t i) { return !mask || (mask[i >> 6] >> (i & 63)) & 1; }

/* units(x) as the SQL: CAST(round(x * scale) AS BIGINT); false where that fails. */
static inline bool units(double x, double scale, int64_t *out) {
  double r = round(x * scale);
  if (!isfinite(r) || !(r >= -9223372036854775808.0 && r < 9223372036854775808.0)) return false;
  *out = (int64_t)r;
  return true;
}

static void sink(duckdb_function_info info, duckdb_data_chunk input, duckdb_vector output) {
  job *j = (job *)duckdb_scalar_function_get_extra_info(info);
  idx_t n = duckdb_data_chunk_get_size(input);
  cell *cells = tlsJob == j->id ? tlsCells : attach(j);
  if (!cells) {
    duckdb_scalar_function_set_error(info, "concordance sums: out of memory");
    return;
  }
  const void *col[8];
  const uint64_t *mask[8];
  for (int c = 0; c < 8; c++) {
    duckdb_vector v = duckdb_data_chunk_get_vector(input, c);
    col[c] = duckdb_vector_get_data(v);
    mask[c] = duckdb_vector_get_validity(v);
  }
  const int32_t *gid = col[0], *cid = col[1], *yoff = col[2], *kind = col[3];
  const double *value = col[4];
  const int64_t *unit = col[5];
  const bool *nomass = col[6], *flag = col[7];
  memset(duckdb_vector_get_data(output), 0, n * sizeof(int32_t));
  const int32_t CK = j->cks + 1, Y = j->years, K = j->kinds;
  const double scale = j->scale;
  uint64_t invalid = 0;
  for (idx_t i = 0; i < n; i++) {
    if (!valid(mask[0], i) || !valid(mask[2], i) || !valid(mask[3], i) || !valid(mask[5], i) || !valid(mask[6], i)) { invalid++; continue; }
    int32_t g = gid[i], y = yoff[i], k = kind[i];
    if (g < 0 || g >= j->groups || y < 0 || y >= Y || k < 0 || k >= K) { invalid++; continue; }
    size_t base = (size_t)g * CK;
    bool nm = nomass[i];
    int64_t u = unit[i];
    if (!valid(mask[1], i)) {
      cell *c = &cells[((base + j->cks) * Y + y) * K + k];
      c->rows++;
      c->unmappedRows++;
      if (!nm) {
        c->in += u;
        c->un += u;
      }
      continue;
    }
    int32_t com = cid[i];
    if (com < 0 || com >= j->ncom) { invalid++; continue; }
    bool hasValue = valid(mask[4], i);
    double v = hasValue ? value[i] : 0.0;
    bool hasFlag = valid(mask[7], i);
    for (int32_t r = j->cstart[com]; r < j->cstart[com + 1]; r++) {
      cell *c = &cells[((base + j->ck[r]) * Y + y) * K + k];
      int64_t x;
      if (hasValue) {
        if (!units((v * j->factor[r]) * j->share[r], scale, &x)) { invalid++; continue; }
        c->m += x;
        c->nm++;
      }
      if (!units(v * j->share[r], scale, &x)) { invalid++; continue; }
      c->d += x;
      if (j->first[r] && !nm) c->in += u;
      if (hasFlag) {
        c->nflag++;
        c->flag |= flag[i];
      }
      c->rows++;
      c->mappedRows++;
    }
  }
  if (invalid) __atomic_add_fetch(&j->invalid, invalid, __ATOMIC_RELAXED);
}

static bool fits(__int128 x) { return x >= INT64_MIN && x <= INT64_MAX; }

static void execute(napi_env env, void *data) {
  (void)env;
  job *j = (job *)data;
  duckdb_connection conn = NULL;
  if (duckdb_connect(j->db, &conn) != 0) {
    snprintf(j->error, sizeof j->error, "concordance sums: cannot open a connection");
    return;
  }
  const int params[8] = { TYPE_INTEGER, TYPE_INTEGER, TYPE_INTEGER, TYPE_INTEGER, TYPE_DOUBLE, TYPE_BIGINT, TYPE_BOOLEAN, TYPE_BOOLEAN };
  bool ok = cairn_run_sink(conn, "__cairn_conc_", j->id, params, 8, j, sink, j->sql, j->error, sizeof j->error);
  duckdb_disconnect(&conn);
  if (!ok || j->invalid) return;
  /* Add the threads' cells into the first; keep those that received rows. */
  cell *t = j->nlocals ? j->locals[0] : NULL;
  for (int l = 1; l < j->nlocals; l++) {
    cell *o = j->locals[l];
    for (size_t c = 0; c < j->cells; c++) {
      if (!o[c].rows) continue;
      t[c].m += o[c].m;
      t[c].d += o[c].d;
      t[c].in += o[c].in;
      t[c].un += o[c].un;
      t[c].nm += o[c].nm;
      t[c].mappedRows += o[c].mappedRows;
      t[c].unmappedRows += o[c].unmappedRows;
      t[c].rows += o[c].rows;
      t[c].nflag += o[c].nflag;
      t[c].flag |= o[c].flag;
    }
  }
  size_t n = 0;
  for (size_t c = 0; t && c < j->cells; c++) n += t[c].rows > 0;
  j->out_i32 = malloc((n ? n : 1) * 6 * sizeof(int32_t));
  j->out_i64 = malloc((n ? n : 1) * 6 * sizeof(int64_t));
  if (!j->out_i32 || !j->out_i64) {
    snprintf(j->error, sizeof j->error, "concordance sums: out of memory");
    return;
  }
  const size_t CK = (size_t)j->cks + 1, Y = (size_t)j->years, K = (size_t)j->kinds;
  size_t w = 0;
  for (size_t c = 0; t && c < j->cells; c++) {
    cell *x = &t[c];
    if (!x->rows) continue;
    if (!fits(x->m) || !fits(x->d) || !fits(x->in) || !fits(x->un)) {
      j->invalid++;
      return;
    }
    size_t k = c % K, y = (c / K) % Y, ck = (c / (K * Y)) % CK, g = c / (K * Y * CK);
    int32_t *o = j->out_i32;
    o[w] = (int32_t)g;
    o[n + w] = ck == (size_t)j->cks ? -1 : (int32_t)ck;
    o[2 * n + w] = (int32_t)y;
    o[3 * n + w] = (int32_t)k;
    o[4 * n + w] = x->nm > 0;
    o[5 * n + w] = x->nflag > 0 ? x->flag : -1;
    int64_t *p = j->out_i64;
    p[w] = (int64_t)x->m;
    p[n + w] = (int64_t)x->d;
    p[2 * n + w] = (int64_t)x->in;
    p[3 * n + w] = (int64_t)x->un;
    p[4 * n + w] = x->mappedRows;
    p[5 * n + w] = x->unmappedRows;
    w++;
  }
  j->n = n;
}

static void complete(napi_env env, napi_status status, void *data) {
  job *j = (job *)data;
  napi_value v;
  if (status != napi_ok && !j->error[0]) snprintf(j->error, sizeof j->error, "concordance sums: cancelled");
  if (j->error[0]) {
    cairn_reject(env, j->deferred, j->error);
  } else {
    napi_create_object(env, &v);
    napi_value x;
    napi_create_double(env, (double)j->invalid, &x);
    napi_set_named_property(env, v, "invalid", x);
    napi_create_double(env, (double)j->n, &x);
    napi_set_named_property(env, v, "cells", x);
    if (!j->invalid) {
      void *p;
      napi_value ab, arr;
      napi_create_arraybuffer(env, j->n * 6 * sizeof(int32_t), &p, &ab);
      if (j->n) memcpy(p, j->out_i32, j->n * 6 * sizeof(int32_t));
      napi_create_typedarray(env, napi_int32_array, j->n * 6, ab, 0, &arr);
      napi_set_named_property(env, v, "ints", arr);
      napi_create_arraybuffer(env, j->n * 6 * sizeof(int64_t), &p, &ab);
      if (j->n) memcpy(p, j->out_i64, j->n * 6 * sizeof(int64_t));
      napi_create_typedarray(env, napi_bigint64_array, j->n * 6, ab, 0, &arr);
      napi_set_named_property(env, v, "sums", arr);
    }
    napi_resolve_deferred(env, j->deferred, v);
  }
  for (int l = 0; l < j->nlocals; l++) free(j->locals[l]);
  for (int r = 0; r < 5; r++) if (j->refs[r]) napi_delete_reference(env, j->refs[r]);
  free(j->out_i32);
  free(j->out_i64);
  napi_delete_async_work(env, j->work);
  pthread_mutex_destroy(&j->mu);
  free(j->sql);
  free(j);
}

static bool typed(napi_env env, napi_value v, napi_typedarray_type want, size_t minLen, void **data, napi_ref *ref) {
  napi_typedarray_type type;
  size_t len, off;
  napi_value ab;
  if (napi_get_typedarray_info(env, v, &type, &len, data, &ab, &off) != napi_ok || type != want || len < minLen) return false;
  napi_create_reference(env, v, 1, ref);
  return true;
}

/*
 * concordanceSums(database, sql, dims, cstart, ck, factor, share, first) → Promise<{invalid,
 * cells, ints, sums}>. dims = [groups, cks, years, kinds, commodities, scale]. `sql` selects
 * (gid INTEGER, cid INTEGER or NULL for an unmapped row, year offset INTEGER, kind INTEGER,
 * value DOUBLE, units BIGINT, nomass BOOLEAN, flag BOOLEAN). The concordance rows of commodity
 * c are cstart[c] .. cstart[c+1] (Int32Array of commodities + 1) in ck (Int32Array, the
 * concordance-side key id), factor, share (Float64Array) and first (Int32Array, 1 for the
 * commodity's first row). ints holds 6 columns of `cells` rows (gid, ck or -1, year offset,
 * kind, any mapped value, flag or -1), sums 6 (mapped, distributed, in, unmapped, mapped rows,
 * unmapped rows). invalid > 0: the SQL must be run instead (nothing else is returned).
 */
static napi_value concordance_sums(napi_env env, napi_callback_info info) {
  size_t argc = 8;
  napi_value argv[8];
  if (napi_get_cb_info(env, info, &argc, argv, NULL, NULL) != napi_ok || argc < 8) return cairn_fail(env, "concordanceSums(database, sql, dims, cstart, ck, factor, share, first)");
  duckdb_database db = cairn_database(env, argv[0]);
  if (!db) return cairn_fail(env, "concordanceSums: not an open DuckDB database");
  job *j = calloc(1, sizeof *j);
  if (!j) return cairn_fail(env, "concordanceSums: out of memory");
  j->db = db;
  j->sql = cairn_string(env, argv[1]);
  double d[6] = { 0 };
  for (uint32_t i = 0; i < 6; i++) {
    napi_value x;
    napi_get_element(env, argv[2], i, &x);
    napi_get_value_double(env, x, &d[i]);
  }
  j->groups = (int32_t)d[0];
  j->cks = (int32_t)d[1];
  j->years = (int32_t)d[2];
  j->kinds = (int32_t)d[3];
  j->ncom = (int32_t)d[4];
  j->scale = d[5];
  const char *bad = NULL;
  if (!j->sql) bad = "concordanceSums: sql";
  else if (j->groups < 1 || j->cks < 0 || j->years < 1 || j->kinds < 1 || j->ncom < 0 || !(j->scale > 0)) bad = "concordanceSums: dims";
  else {
    j->cells = (size_t)j->groups * (size_t)(j->cks + 1) * (size_t)j->years * (size_t)j->kinds;
    void *p;
    if (!typed(env, argv[3], napi_int32_array, (size_t)j->ncom + 1, &p, &j->refs[0])) bad = "concordanceSums: cstart";
    else {
      j->cstart = p;
      size_t rows = (size_t)j->cstart[j->ncom];
      if (!typed(env, argv[4], napi_int32_array, rows, &p, &j->refs[1])) bad = "concordanceSums: ck";
      else if ((j->ck = p), !typed(env, argv[5], napi_float64_array, rows, &p, &j->refs[2])) bad = "concordanceSums: factor";
      else if ((j->factor = p), !typed(env, argv[6], napi_float64_array, rows, &p, &j->refs[3])) bad = "concordanceSums: share";
      else if ((j->share = p), !typed(env, argv[7], napi_int32_array, rows, &p, &j->refs[4])) bad = "concordanceSums: first";
      else {
        j->first = p;
        for (size_t r = 0; r < rows && !bad; r++) if (j->ck[r] < 0 || j->ck[r] >= j->cks) bad = "concordanceSums: ck out of range";
      }
    }
  }
  if (bad) {
    for (int r = 0; r < 5; r++) if (j->refs[r]) napi_delete_reference(env, j->refs[r]);
    free(j->sql);
    free(j);
    return cairn_fail(env, bad);
  }
  j->id = __atomic_add_fetch(&jobCounter, 1, __ATOMIC_RELAXED);
  pthread_mutex_init(&j->mu, NULL);
  return cairn_queue(env, "cairn.concordanceSums", execute, complete, j, &j->deferred, &j->work);
}

void cairn_register_concsum(napi_env env, napi_value exports) {
  napi_value fn;
  napi_create_function(env, "concordanceSums", NAPI_AUTO_LENGTH, concordance_sums, NULL, &fn);
  napi_set_named_property(env, exports, "concordanceSums", fn);
}
