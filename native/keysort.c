/*
 * Sorted keys without DuckDB's sort. A statement's rows (a 64-bit key and, for pairs, a 64-bit
 * value) are handed, chunk by chunk, on DuckDB's own worker threads, to a scalar function
 * registered for the job; each thread files them by the key's high bits into partitions of
 * small blocks (memory advised for 2 MiB pages). Afterwards every partition is gathered, sorted
 * in cache (LSD radix on the bits below the partition's) and scanned in key order, the
 * partitions shared among threads. At 10^8 rows this replaces a window sort of DuckDB's that
 * took 11–24 s here (README, "Performance").
 *
 * Two uses (mode):
 *   0  key statistics: rows, NULL keys, keys equal to the key before them in sorted order
 *      (the duplicate-key hashes of a source, src/sources/load.ts);
 *   1  report pairs: key = 2·pair + flow (0 or 1), value = an exact quantity. A key equal to the
 *      one before it is a duplicate report (counted); an odd key right after key − 1 closes a
 *      pair, appended as (pair, value, value before) to a table, in key order (the trade
 *      asymmetry audit, src/ops/asymmetry.ts).
 * Keys must lie in [0, 2^bits); others are counted (outOfRange) and left out, so that the
 * caller can take its general way.
 *
 * DuckDB C API used (DuckDB 1.x): duckdb_create_scalar_function and its setters,
 * duckdb_register_scalar_function, duckdb_scalar_function_get_extra_info,
 * duckdb_scalar_function_set_error, duckdb_create_logical_type, duckdb_appender_create,
 * duckdb_append_data_chunk, duckdb_create_data_chunk (declared in common.h).
 */
#define _GNU_SOURCE
#include <node_api.h>
#include <pthread.h>
#include <stdbool.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/mman.h>
#include <unistd.h>

#include "common.h"

/* ---- memory: chunks (256 MiB, or less under a small budget) advised for huge pages, handed out by bumping ---- */

#define CHUNK ((size_t)256 << 20)
#define SLAB ((size_t)2 << 20)
#define MAXCHUNKS 4096
typedef struct {
  pthread_mutex_t mu;
  char *chunk[MAXCHUNKS];
  size_t size[MAXCHUNKS];
  int n;
  size_t used;    /* in the last chunk */
  size_t *mapped; /* bytes mapped by all arenas of the job, against … */
  size_t cap;     /* … the job's budget (0: none) */
  size_t chunkSize;
} arena;

static void arena_init(arena *a, size_t *mapped, size_t cap) {
  memset(a, 0, sizeof *a);
  pthread_mutex_init(&a->mu, NULL);
  a->mapped = mapped;
  a->cap = cap;
  /* Chunks of 256 MiB, or an eighth of a smaller budget (at least one slab). */
  a->chunkSize = cap && cap / 8 < CHUNK ? (cap / 8 > SLAB ? cap / 8 / SLAB * SLAB : SLAB) : CHUNK;
}

/* size bytes (16-aligned), or NULL when out of memory or over the budget. Thread-safe. */
static void *arena_take(arena *a, size_t size) {
  size = (size + 15) & ~(size_t)15;
  pthread_mutex_lock(&a->mu);
  void *p = NULL;
  if (a->n == 0 || a->used + size > a->size[a->n - 1]) {
    size_t want = size > a->chunkSize ? (size + SLAB - 1) & ~(SLAB - 1) : a->chunkSize;
    size_t before = __atomic_fetch_add(a->mapped, want, __ATOMIC_RELAXED);
    if (a->cap && before + want > a->cap) __atomic_fetch_sub(a->mapped, want, __ATOMIC_RELAXED);
    else if (a->n < MAXCHUNKS) {
      char *c = mmap(NULL, want, PROT_READ | PROT_WRITE, MAP_PRIVATE | MAP_ANONYMOUS | MAP_NORESERVE, -1, 0);
      if (c != MAP_FAILED) {
        madvise(c, want, MADV_HUGEPAGE);
        a->chunk[a->n] = c;
        a->size[a->n] = want;
        a->n++;
        a->used = 0;
      }
    }
  }
  if (a->n > 0 && a->used + size <= a->size[a->n - 1]) {
    p = a->chunk[a->n - 1] + a->used;
    a->used += size;
  }
  pthread_mutex_unlock(&a->mu);
  return p;
}

static void arena_free(arena *a) {
  for (int i = 0; i < a->n; i++) {
    munmap(a->chunk[i], a->size[i]);
    __atomic_fetch_sub(a->mapped, a->size[i], __ATOMIC_RELAXED);
  }
  a->n = 0;
  a->used = 0;
}

/* ---- the job ---- */

typedef struct { uint64_t k; int64_t v; } rec;
/* A partition's rows in a chain of blocks, each twice the one before (16 rows up to 1,023:
   16 KiB), so that 4,096 partitions of a small statement take little memory. */
#define BLOCK_MIN 16
#define BLOCK_MAX 1023
typedef struct block { struct block *prev; uint32_t n, cap; rec r[]; } block;
#define MAXLOCALS 64
#define PART_BITS 12

struct job;
typedef struct {
  struct job *job;
  block **head;    /* per partition: the newest block (blocks chain backwards) */
  uint64_t *count; /* per partition */
  char *slab;
  size_t slabLeft;
  uint64_t rows, nulls, outOfRange;
} local;

typedef struct { int64_t *k, *m, *x; uint64_t n; } pairs_out;

typedef struct job {
  uint64_t id;
  int mode, bits, shift;
  uint32_t parts;
  duckdb_database db;
  char *sql;     /* the rows: SELECT of one (mode 0) or two (mode 1) columns */
  char table[256];
  pthread_mutex_t mu;
  local *locals[MAXLOCALS];
  int nlocals;
  arena blocks, outs;
  uint32_t nextPart;
  pairs_out *out; /* mode 1: per partition */
  uint64_t rows, nulls, outOfRange, equal, pairs;
  size_t mapped, cap; /* bytes mapped, budget (0: none) */
  int over;           /* the budget was reached: rows were dropped, nothing is sorted or appended */
  char error[1024];
  napi_deferred deferred;
  napi_async_work work;
} job;

static uint64_t jobCounter;
static __thread uint64_t tlsJob;
static __thread local *tlsLocal;

static local *attach(job *j) {
  local *L = calloc(1, sizeof *L);
  if (!L) return NULL;
  L->job = j;
  L->head = calloc(j->parts, sizeof *L->head);
  L->count = calloc(j->parts, sizeof *L->count);
  pthread_mutex_lock(&j->mu);
  bool ok = L->head && L->count && j->nlocals < MAXLOCALS;
  if (ok) j->locals[j->nlocals++] = L;
  pthread_mutex_unlock(&j->mu);
  if (!ok) {
    free(L->head);
    free(L->count);
    free(L);
    return NULL;
  }
  tlsJob = j->id;
  tlsLocal = L;
  return L;
}

static block *new_block(local *L, block *prev) {
  uint32_t cap = prev ? (prev->cap * 2 + 1 < BLOCK_MAX ? prev->cap * 2 + 1 : BLOCK_MAX) : BLOCK_MIN;
  size_t bytes = sizeof(block) + cap * sizeof(rec);
  if (L->slabLeft < bytes) {
    L->slab = arena_take(&L->job->blocks, SLAB);
    L->slabLeft = L->slab ? SLAB : 0;
    if (!L->slab) return NULL;
  }
  block *b = (block *)L->slab;
  L->slab += bytes;
  L->slabLeft -= bytes;
  b->prev = prev;
  b->n = 0;
  b->cap = cap;
  return b;
}

static inline bool valid(const uint64_t *mask, idx_t i) { return !mask || (mask[i >> 6] >> (i & 63)) & 1; }

/* The scalar function: files each row's key (and value) under its partition; returns 0. */
static void sink(duckdb_function_info info, duckdb_data_chunk input, duckdb_vector output) {
  job *j = (job *)duckdb_scalar_function_get_extra_info(info);
  idx_t n = duckdb_data_chunk_get_size(input);
  memset(duckdb_vector_get_data(output), 0, n * sizeof(int32_t));
  if (__atomic_load_n(&j->over, __ATOMIC_RELAXED)) return;
  local *L = tlsJob == j->id ? tlsLocal : attach(j);
  if (!L) {
    duckdb_scalar_function_set_error(info, "sorted keys: out of memory (thread state)");
    return;
  }
  duckdb_vector kv = duckdb_data_chunk_get_vector(input, 0);
  const uint64_t *k = (const uint64_t *)duckdb_vector_get_data(kv);
  const uint64_t *km = duckdb_vector_get_validity(kv);
  const int64_t *v = NULL;
  const uint64_t *vm = NULL;
  if (j->mode == 1) {
    duckdb_vector vv = duckdb_data_chunk_get_vector(input, 1);
    v = (const int64_t *)duckdb_vector_get_data(vv);
    vm = duckdb_vector_get_validity(vv);
  }
  const int shift = j->shift, bits = j->bits;
  for (idx_t i = 0; i < n; i++) {
    if (!valid(km, i) || (v && !valid(vm, i))) { L->nulls++; continue; }
    uint64_t key = k[i];
    if (bits < 64 && (key >> bits)) { L->outOfRange++; continue; }
    uint32_t p = (uint32_t)(key >> shift);
    block *b = L->head[p];
    if (!b || b->n == b->cap) {
      b = new_block(L, b);
      if (!b) { /* over the budget (or out of memory): the caller sorts in SQL instead */
        __atomic_store_n(&j->over, 1, __ATOMIC_RELAXED);
        return;
      }
      L->head[p] = b;
    }
    b->r[b->n].k = key;
    b->r[b->n].v = v ? v[i] : 0;
    b->n++;
    L->count[p]++;
  }
  L->rows += n;
}

/* LSD radix sort of a[0..n) on key bits [0, bits), 11 at a time; t is scratch of n. Returns the sorted array (a or t). */
static rec *radix(rec *a, rec *t, size_t n, int bits) {
  static const int D = 11;
  uint32_t cnt[1 << 11];
  for (int lo = 0; lo < bits; lo += D) {
    int w = bits - lo < D ? bits - lo : D;
    uint64_t mask = ((uint64_t)1 << w) - 1;
    memset(cnt, 0, sizeof(uint32_t) << w);
    for (size_t i = 0; i < n; i++) cnt[(a[i].k >> lo) & mask]++;
    uint32_t sum = 0;
    bool single = false;
    for (uint64_t d = 0; d <= mask; d++) {
      if (cnt[d] == n) single = true;
      uint32_t c = cnt[d];
      cnt[d] = sum;
      sum += c;
    }
    if (single) continue; /* all rows share this digit */
    for (size_t i = 0; i < n; i++) t[cnt[(a[i].k >> lo) & mask]++] = a[i];
    rec *s = a;
    a = t;
    t = s;
  }
  return a;
}

static void *sort_parts(void *arg) {
  job *j = (job *)arg;
  rec *a = NULL, *t = NULL;
  size_t cap = 0;
  uint64_t equal = 0, pairs = 0;
  for (;;) {
    uint32_t p = __atomic_fetch_add(&j->nextPart, 1, __ATOMIC_RELAXED);
    if (p >= j->parts) break;
    size_t n = 0;
    for (int l = 0; l < j->nlocals; l++) n += j->locals[l]->count[p];
    if (n < 2) continue;
    if (n > cap) {
      free(a);
      free(t);
      cap = n + n / 4;
      a = malloc(cap * sizeof(rec));
      t = malloc(cap * sizeof(rec));
      if (!a || !t) {
        pthread_mutex_lock(&j->mu);
        snprintf(j->error, sizeof j->error, "sorted keys: out of memory (%zu rows in one partition)", n);
        pthread_mutex_unlock(&j->mu);
        break;
      }
    }
    size_t m = 0;
    for (int l = 0; l < j->nlocals; l++)
      for (block *b = j->locals[l]->head[p]; b; b = b->prev) {
        memcpy(a + m, b->r, b->n * sizeof(rec));
        m += b->n;
      }
    rec *s = radix(a, t, n, j->shift);
    if (j->mode == 0) {
      for (size_t i = 1; i < n; i++) equal += s[i].k == s[i - 1].k;
      continue;
    }
    size_t np = 0;
    for (size_t i = 1; i < n; i++) {
      if (s[i].k == s[i - 1].k) equal++;
      else if ((s[i].k & 1) && s[i - 1].k == s[i].k - 1) np++;
    }
    if (np == 0) continue;
    pairs_out *o = &j->out[p];
    o->k = arena_take(&j->outs, np * 3 * sizeof(int64_t));
    if (!o->k) {
      __atomic_store_n(&j->over, 1, __ATOMIC_RELAXED);
      break;
    }
    o->m = o->k + np;
    o->x = o->m + np;
    for (size_t i = 1; i < n; i++) {
      if (s[i].k != s[i - 1].k && (s[i].k & 1) && s[i - 1].k == s[i].k - 1) {
        o->k[o->n] = (int64_t)(s[i].k >> 1);
        o->m[o->n] = s[i].v;
        o->x[o->n] = s[i - 1].v;
        o->n++;
      }
    }
    pairs += np;
  }
  free(a);
  free(t);
  __atomic_add_fetch(&j->equal, equal, __ATOMIC_RELAXED);
  __atomic_add_fetch(&j->pairs, pairs, __ATOMIC_RELAXED);
  return NULL;
}

/* Mode 1: the pairs, in key order, appended to j->table (pair BIGINT, m BIGINT, x BIGINT). */
static void append_pairs(job *j, duckdb_connection conn) {
  duckdb_appender app = NULL;
  if (duckdb_appender_create(conn, NULL, j->table, &app) != 0) {
    snprintf(j->error, sizeof j->error, "sorted keys: cannot append to %s: %s", j->table, app ? duckdb_appender_error(app) : "");
    if (app) duckdb_appender_destroy(&app);
    return;
  }
  duckdb_logical_type types[3];
  for (int c = 0; c < 3; c++) types[c] = duckdb_create_logical_type(TYPE_BIGINT);
  duckdb_data_chunk chunk = duckdb_create_data_chunk(types, 3);
  for (int c = 0; c < 3; c++) duckdb_destroy_logical_type(&types[c]);
  int64_t *col[3];
  for (int c = 0; c < 3; c++) col[c] = duckdb_vector_get_data(duckdb_data_chunk_get_vector(chunk, c));
  const idx_t cap = duckdb_vector_size();
  idx_t fill = 0;
  bool ok = true;
  for (uint32_t p = 0; ok && p < j->parts; p++) {
    pairs_out *o = &j->out[p];
    for (uint64_t i = 0; ok && i < o->n; i++) {
      col[0][fill] = o->k[i];
      col[1][fill] = o->m[i];
      col[2][fill] = o->x[i];
      if (++fill == cap) {
        duckdb_data_chunk_set_size(chunk, fill);
        ok = duckdb_append_data_chunk(app, chunk) == 0;
        fill = 0;
      }
    }
  }
  if (ok && fill) {
    duckdb_data_chunk_set_size(chunk, fill);
    ok = duckdb_append_data_chunk(app, chunk) == 0;
  }
  if (ok) ok = duckdb_appender_close(app) == 0;
  if (!ok) snprintf(j->error, sizeof j->error, "sorted keys: appending to %s: %s", j->table, duckdb_appender_error(app));
  duckdb_destroy_data_chunk(&chunk);
  duckdb_appender_destroy(&app);
}

static void execute(napi_env env, void *data) {
  (void)env;
  job *j = (job *)data;
  duckdb_connection conn = NULL;
  if (duckdb_connect(j->db, &conn) != 0) {
    snprintf(j->error, sizeof j->error, "sorted keys: cannot open a connection");
    return;
  }
  const int params[2] = { j->mode == 0 ? TYPE_UBIGINT : TYPE_BIGINT, TYPE_BIGINT };
  bool ok = cairn_run_sink(conn, "__cairn_keys_", j->id, params, j->mode == 0 ? 1 : 2, j, sink, j->sql, j->error, sizeof j->error);
  if (ok && !j->over) {
    for (int l = 0; l < j->nlocals; l++) {
      j->rows += j->locals[l]->rows;
      j->nulls += j->locals[l]->nulls;
      j->outOfRange += j->locals[l]->outOfRange;
    }
    if (j->mode == 1) j->out = calloc(j->parts, sizeof *j->out);
    if (j->mode == 1 && !j->out) snprintf(j->error, sizeof j->error, "sorted keys: out of memory");
    else {
      long cpus = sysconf(_SC_NPROCESSORS_ONLN);
      int nt = cpus < 1 ? 1 : cpus > 16 ? 16 : (int)cpus;
      pthread_t th[16];
      int started = 0;
      for (int i = 1; i < nt; i++) if (pthread_create(&th[started], NULL, sort_parts, j) == 0) started++;
      sort_parts(j);
      for (int i = 0; i < started; i++) pthread_join(th[i], NULL);
      arena_free(&j->blocks);
      if (!j->error[0] && !j->over && j->mode == 1 && j->equal == 0) append_pairs(j, conn);
    }
  }
  arena_free(&j->blocks);
  arena_free(&j->outs);
  duckdb_disconnect(&conn);
}

static void set_num(napi_env env, napi_value o, const char *k, double v) {
  napi_value x;
  napi_create_double(env, v, &x);
  napi_set_named_property(env, o, k, x);
}

static void complete(napi_env env, napi_status status, void *data) {
  job *j = (job *)data;
  napi_value v;
  if (status != napi_ok && !j->error[0]) snprintf(j->error, sizeof j->error, "sorted keys: cancelled");
  if (j->error[0]) {
    cairn_reject(env, j->deferred, j->error);
  } else {
    napi_create_object(env, &v);
    set_num(env, v, "rows", (double)j->rows);
    set_num(env, v, "nulls", (double)j->nulls);
    set_num(env, v, "outOfRange", (double)j->outOfRange);
    set_num(env, v, "equal", (double)j->equal);
    set_num(env, v, "pairs", (double)j->pairs);
    set_num(env, v, "overBudget", j->over);
    napi_resolve_deferred(env, j->deferred, v);
  }
  for (int l = 0; l < j->nlocals; l++) {
    free(j->locals[l]->head);
    free(j->locals[l]->count);
    free(j->locals[l]);
  }
  free(j->out);
  napi_delete_async_work(env, j->work);
  pthread_mutex_destroy(&j->mu);
  free(j->sql);
  free(j);
}

/*
 * sortedKeys(database, mode, sql, bits, table, budget) → Promise<{rows, nulls, outOfRange,
 * equal, pairs, overBudget}>: runs on a connection of its own, off the JavaScript thread. `sql` selects the
 * key (UBIGINT in mode 0, BIGINT in mode 1) and in mode 1 the value (BIGINT); keys lie in
 * [0, 2^bits). Mode 1 appends the pairs to `table` (three BIGINT columns, created by the
 * caller outside any TEMP schema: it must be seen from this connection) unless a key repeats
 * (equal > 0). Settings made with SET on the caller's connection are global and hold here too.
 * The rows' memory (16 bytes a row, in 256 MiB chunks) stays within `budget` bytes (0: no
 * limit); beyond it the job stops taking rows, sorts nothing and says overBudget = 1, and the
 * caller sorts in SQL, where DuckDB can spill to disk.
 */
static napi_value sorted_keys(napi_env env, napi_callback_info info) {
  size_t argc = 6;
  napi_value argv[6];
  if (napi_get_cb_info(env, info, &argc, argv, NULL, NULL) != napi_ok || argc < 6) return cairn_fail(env, "sortedKeys(database, mode, sql, bits, table, budget)");
  duckdb_database db = cairn_database(env, argv[0]);
  if (!db) return cairn_fail(env, "sortedKeys: not an open DuckDB database");
  int32_t mode = -1, bits = 0;
  napi_get_value_int32(env, argv[1], &mode);
  napi_get_value_int32(env, argv[3], &bits);
  if (mode != 0 && mode != 1) return cairn_fail(env, "sortedKeys: mode 0 (key statistics) or 1 (pairs)");
  if (bits < 1 || bits > 64 || (mode == 1 && bits < 2)) return cairn_fail(env, "sortedKeys: bits from 1 to 64 (2 to 64 for pairs)");
  job *j = calloc(1, sizeof *j);
  if (!j) return cairn_fail(env, "sortedKeys: out of memory");
  j->db = db;
  j->mode = mode;
  j->bits = bits;
  double budget = 0;
  napi_get_value_double(env, argv[5], &budget);
  j->cap = budget > 0 ? (size_t)budget : 0;
  /* Partitions by the high bits; for pairs never the lowest bit, so that both reports of a pair share one. */
  int low = mode == 1 ? 1 : 0;
  j->shift = bits - PART_BITS > low ? bits - PART_BITS : low;
  j->parts = (uint32_t)1 << (bits - j->shift);
  j->id = __atomic_add_fetch(&jobCounter, 1, __ATOMIC_RELAXED);
  j->sql = cairn_string(env, argv[2]);
  size_t len = 0;
  if (!j->sql || napi_get_value_string_utf8(env, argv[4], j->table, sizeof j->table, &len) != napi_ok || len >= sizeof j->table - 1) {
    free(j->sql);
    free(j);
    return cairn_fail(env, "sortedKeys: sql and table (at most 254 bytes) must be strings");
  }
  pthread_mutex_init(&j->mu, NULL);
  arena_init(&j->blocks, &j->mapped, j->cap);
  arena_init(&j->outs, &j->mapped, j->cap);
  return cairn_queue(env, "cairn.sortedKeys", execute, complete, j, &j->deferred, &j->work);
}

void cairn_register_keysort(napi_env env, napi_value exports) {
  napi_value fn;
  napi_create_function(env, "sortedKeys", NAPI_AUTO_LENGTH, sorted_keys, NULL, &fn);
  napi_set_named_property(env, exports, "sortedKeys", fn);
}
