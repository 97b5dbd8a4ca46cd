/*
 * cairn's native hand-off: copies the columns of a materialised DuckDB result into typed
 * arrays, chunk by chunk, with one memcpy per chunk and column and no JavaScript object per
 * chunk; and lets DuckDB read typed arrays in place, as an Arrow stream, to run a statement over
 * them (an INSERT or a COPY) on a connection of its own, off the JavaScript thread. Built by
 * scripts/build-native.mjs (optional: without it the hand-off uses the bindings' per-chunk
 * calls). It links the libduckdb.so that @duckdb/node-bindings loads and uses the handles the
 * bindings hold in N-API externals: a duckdb_result*, and a pointer to a struct whose first
 * field is the duckdb_database (the layout of @duckdb/node-bindings 1.5;
 * scripts/build-native.mjs records the version it built against, and src/engine/handoff.ts does
 * not load this library for another one).
 *
 * DuckDB C API used (duckdb.h, DuckDB 1.x): duckdb_result_chunk_count, duckdb_result_get_chunk,
 * duckdb_data_chunk_get_size, duckdb_data_chunk_get_vector, duckdb_vector_get_data,
 * duckdb_vector_get_validity, duckdb_destroy_data_chunk, duckdb_connect, duckdb_disconnect,
 * duckdb_arrow_scan, duckdb_query, duckdb_result_error, duckdb_rows_changed,
 * duckdb_destroy_result.
 */
#include <node_api.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "common.h"

static int all_valid(const uint64_t *mask, idx_t n) {
  if (!mask) return 1;
  idx_t words = n / 64;
  for (idx_t i = 0; i < words; i++) if (mask[i] != ~(uint64_t)0) return 0;
  idx_t rest = n % 64;
  if (rest) {
    uint64_t m = (((uint64_t)1) << rest) - 1;
    if ((mask[words] & m) != m) return 0;
  }
  return 1;
}

/*
 * Reads the typed arrays `arrays[0..n)` and their element widths `widths[0..n)` (8: Float64Array,
 * 4: Int32Array) into data pointers, widths and lengths (in elements). Returns NULL, or the
 * message of what is wrong.
 */
static const char *typed_columns(napi_env env, napi_value arrays, napi_value widths, uint32_t n, uint8_t **data, uint32_t *width, size_t *length) {
  for (uint32_t j = 0; j < n; j++) {
    napi_value t, w, ab;
    napi_typedarray_type type;
    size_t offset;
    void *ptr;
    napi_get_element(env, arrays, j, &t);
    napi_get_element(env, widths, j, &w);
    if (napi_get_typedarray_info(env, t, &type, &length[j], &ptr, &ab, &offset) != napi_ok) return "not a typed array";
    napi_get_value_uint32(env, w, &width[j]);
    if (!((type == napi_float64_array && width[j] == 8) || (type == napi_int32_array && width[j] == 4))) return "arrays must be Float64Array (width 8) or Int32Array (width 4)";
    data[j] = (uint8_t *)ptr;
  }
  return NULL;
}

/*
 * copyColumns(result, targets, widths): targets[j] is a typed array that receives column j,
 * widths[j] its element size in bytes (8 for DOUBLE, 4 for INTEGER). Returns the row count.
 * Throws when a target is too small or a column holds NULLs (message "NULL in column j").
 */
static napi_value copy_columns(napi_env env, napi_callback_info info) {
  size_t argc = 3;
  napi_value argv[3];
  if (napi_get_cb_info(env, info, &argc, argv, NULL, NULL) != napi_ok || argc < 3) return cairn_fail(env, "copyColumns(result, targets, widths)");
  duckdb_result *res = NULL;
  if (napi_get_value_external(env, argv[0], (void **)&res) != napi_ok || !res || !res->internal_data) return cairn_fail(env, "copyColumns: not a DuckDB result");
  uint32_t ncols = 0;
  napi_get_array_length(env, argv[1], &ncols);
  if (ncols > 64) return cairn_fail(env, "copyColumns: at most 64 columns");
  uint8_t *base[64];
  size_t cap[64];
  uint32_t width[64];
  const char *bad = typed_columns(env, argv[1], argv[2], ncols, base, width, cap);
  if (bad) {
    char msg[128];
    snprintf(msg, sizeof msg, "copyColumns: targets: %s", bad);
    return cairn_fail(env, msg);
  }
  idx_t chunks = duckdb_result_chunk_count(*res);
  idx_t row = 0;
  for (idx_t c = 0; c < chunks; c++) {
    duckdb_data_chunk ch = duckdb_result_get_chunk(*res, c);
    if (!ch) continue;
    idx_t n = duckdb_data_chunk_get_size(ch);
    for (uint32_t j = 0; j < ncols; j++) {
      if (row + n > cap[j]) {
        duckdb_destroy_data_chunk(&ch);
        return cairn_fail(env, "copyColumns: target array too small");
      }
      duckdb_vector v = duckdb_data_chunk_get_vector(ch, j);
      if (!v) {
        duckdb_destroy_data_chunk(&ch);
        return cairn_fail(env, "copyColumns: the result has fewer columns than targets");
      }
      if (!all_valid(duckdb_vector_get_validity(v), n)) {
        duckdb_destroy_data_chunk(&ch);
        char msg[64];
        snprintf(msg, sizeof msg, "NULL in column %u", j);
        return cairn_fail(env, msg);
      }
      memcpy(base[j] + row * width[j], duckdb_vector_get_data(v), n * width[j]);
    }
    row += n;
    duckdb_destroy_data_chunk(&ch);
  }
  napi_value out;
  napi_create_double(env, (double)row, &out);
  return out;
}

/* ---------------- typed arrays scanned by DuckDB in place (Arrow C data interface) ---------------- */

/*
 * The Arrow C data interface (https://arrow.apache.org/docs/format/CDataInterface.html): a
 * struct batch whose child columns point into the typed arrays, one batch per `batch` rows, in
 * order. DuckDB's arrow_scan numbers the batches, so a query over the view keeps their order
 * while it runs on every thread (an ordered COPY or CREATE TABLE needs no sort).
 */
struct ArrowSchema {
  const char *format;
  const char *name;
  const char *metadata;
  int64_t flags;
  int64_t n_children;
  struct ArrowSchema **children;
  struct ArrowSchema *dictionary;
  void (*release)(struct ArrowSchema *);
  void *private_data;
};
struct ArrowArray {
  int64_t length;
  int64_t null_count;
  int64_t offset;
  int64_t n_buffers;
  int64_t n_children;
  const void **buffers;
  struct ArrowArray **children;
  struct ArrowArray *dictionary;
  void (*release)(struct ArrowArray *);
  void *private_data;
};
struct ArrowArrayStream {
  int (*get_schema)(struct ArrowArrayStream *, struct ArrowSchema *out);
  int (*get_next)(struct ArrowArrayStream *, struct ArrowArray *out);
  const char *(*get_last_error)(struct ArrowArrayStream *);
  void (*release)(struct ArrowArrayStream *);
  void *private_data;
};
typedef void *duckdb_arrow_stream;
extern duckdb_state duckdb_arrow_scan(duckdb_connection connection, const char *table_name, duckdb_arrow_stream arrow);

#define MAXCOLS 64
typedef struct {
  /* the columns */
  uint32_t ncols;
  uint8_t *base[MAXCOLS];
  uint32_t width[MAXCOLS];
  char fmt[MAXCOLS][2];
  char name[MAXCOLS][64];
  idx_t rows, batch, next;
  /* the schema, owned here */
  struct ArrowSchema root, cols[MAXCOLS], *colp[MAXCOLS];
} arrow_src;

static void schema_noop(struct ArrowSchema *s) { s->release = NULL; }
static void array_noop(struct ArrowArray *a) { a->release = NULL; }
static void stream_noop(struct ArrowArrayStream *st) { st->release = NULL; }
static const char *stream_error(struct ArrowArrayStream *st) { (void)st; return NULL; }

static int src_schema(struct ArrowArrayStream *st, struct ArrowSchema *out) {
  arrow_src *a = (arrow_src *)st->private_data;
  *out = a->root;
  out->release = schema_noop;
  return 0;
}

/* The structs of one batch, allocated per batch (DuckDB scans several at once) and freed by its release. */
typedef struct {
  struct ArrowArray child[MAXCOLS], *childp[MAXCOLS];
  const void *rbuf[1], *cbuf[MAXCOLS][2];
} arrow_batch;

static void batch_release(struct ArrowArray *a) {
  free(a->private_data);
  a->private_data = NULL;
  a->release = NULL;
}

/* Batch k: rows [k·batch, min(rows, (k + 1)·batch)) of every column; past the end, a released array (the end). */
static int src_next(struct ArrowArrayStream *st, struct ArrowArray *out) {
  arrow_src *a = (arrow_src *)st->private_data;
  memset(out, 0, sizeof *out);
  if (a->next >= a->rows) return 0;
  arrow_batch *b = calloc(1, sizeof *b);
  if (!b) return 12; /* ENOMEM */
  idx_t from = a->next, n = a->rows - from < a->batch ? a->rows - from : a->batch;
  a->next += n;
  for (uint32_t c = 0; c < a->ncols; c++) {
    b->cbuf[c][0] = NULL;
    b->cbuf[c][1] = a->base[c] + from * a->width[c];
    b->child[c] = (struct ArrowArray){ (int64_t)n, 0, 0, 2, 0, b->cbuf[c], NULL, NULL, array_noop, NULL };
    b->childp[c] = &b->child[c];
  }
  b->rbuf[0] = NULL;
  *out = (struct ArrowArray){ (int64_t)n, 0, 0, 1, a->ncols, b->rbuf, b->childp, NULL, batch_release, b };
  return 0;
}

typedef struct {
  duckdb_database db;
  arrow_src src;
  char view[128];
  char *sql;
  char error[512];
  double changed; /* rows the statement inserted or wrote (duckdb_rows_changed) */
  napi_ref refs[MAXCOLS];
  napi_deferred deferred;
  napi_async_work work;
} scan_job;

static void scan_execute(napi_env env, void *data) {
  (void)env;
  scan_job *j = (scan_job *)data;
  duckdb_connection conn = NULL;
  j->error[0] = 0;
  if (duckdb_connect(j->db, &conn) != 0) {
    snprintf(j->error, sizeof j->error, "cannot open a connection");
    return;
  }
  struct ArrowArrayStream st = { src_schema, src_next, stream_error, stream_noop, &j->src };
  /* Views made by arrow_scan are seen by other connections: every scan must have a view name of
   * its own (the caller makes them unique), or one statement reads another's arrays. The
   * statement's count of rows is returned, so that the caller can check that every row went in. */
  if (duckdb_arrow_scan(conn, j->view, (duckdb_arrow_stream)&st) != 0) {
    snprintf(j->error, sizeof j->error, "cannot scan the arrays as %s", j->view);
  } else {
    duckdb_result res;
    memset(&res, 0, sizeof res);
    if (duckdb_query(conn, j->sql, &res) != 0) {
      const char *e = duckdb_result_error(&res);
      snprintf(j->error, sizeof j->error, "%s", e ? e : "the query failed");
    } else {
      j->changed = (double)duckdb_rows_changed(&res);
    }
    duckdb_destroy_result(&res);
    /* The view is not private to this connection: drop it (its stream lives on this stack). */
    char drop[200];
    snprintf(drop, sizeof drop, "DROP VIEW IF EXISTS \"%s\"", j->view);
    memset(&res, 0, sizeof res);
    duckdb_query(conn, drop, &res);
    duckdb_destroy_result(&res);
  }
  duckdb_disconnect(&conn);
}

static void scan_complete(napi_env env, napi_status status, void *data) {
  scan_job *j = (scan_job *)data;
  napi_value v;
  if (status != napi_ok && !j->error[0]) snprintf(j->error, sizeof j->error, "the scan was cancelled");
  if (j->error[0]) {
    cairn_reject(env, j->deferred, j->error);
  } else {
    napi_create_double(env, j->changed, &v);
    napi_resolve_deferred(env, j->deferred, v);
  }
  for (uint32_t c = 0; c < j->src.ncols; c++) napi_delete_reference(env, j->refs[c]);
  napi_delete_async_work(env, j->work);
  free(j->sql);
  free(j);
}

/*
 * scanArrays(database, view, sql, names, sources, rows, batch) → Promise: on a connection of
 * its own, off the JavaScript thread, makes the typed arrays sources[j] (Float64Array: DOUBLE,
 * Int32Array: INTEGER, BigInt64Array: BIGINT) the view `view` with columns names[j]
 * (no copy: DuckDB reads the arrays, `batch` rows at a time, in order) and runs `sql` on it
 * (e.g. a COPY or INSERT). The arrays must not change until the promise settles, which resolves
 * to the number of rows the statement wrote or inserted.
 */
static napi_value scan_arrays(napi_env env, napi_callback_info info) {
  size_t argc = 7;
  napi_value argv[7];
  if (napi_get_cb_info(env, info, &argc, argv, NULL, NULL) != napi_ok || argc < 7) return cairn_fail(env, "scanArrays(database, view, sql, names, sources, rows, batch)");
  duckdb_database db = cairn_database(env, argv[0]);
  if (!db) return cairn_fail(env, "scanArrays: not an open DuckDB database");
  scan_job *j = calloc(1, sizeof *j);
  if (!j) return cairn_fail(env, "scanArrays: out of memory");
  j->db = db;
  size_t len = 0;
  if (napi_get_value_string_utf8(env, argv[1], j->view, sizeof j->view, &len) != napi_ok || len >= sizeof j->view - 1) { free(j); return cairn_fail(env, "scanArrays: view name"); }
  if (napi_get_value_string_utf8(env, argv[2], NULL, 0, &len) != napi_ok) { free(j); return cairn_fail(env, "scanArrays: sql"); }
  j->sql = malloc(len + 1);
  napi_get_value_string_utf8(env, argv[2], j->sql, len + 1, &len);
  uint32_t ncols = 0, ncols2 = 0;
  napi_get_array_length(env, argv[3], &ncols);
  napi_get_array_length(env, argv[4], &ncols2);
  double rowsD = 0, batchD = 0;
  napi_get_value_double(env, argv[5], &rowsD);
  napi_get_value_double(env, argv[6], &batchD);
  const char *bad = NULL;
  if (ncols == 0 || ncols > MAXCOLS || ncols != ncols2) bad = "scanArrays: 1 to 64 columns, one name each";
  else if (!(rowsD >= 0) || !(batchD >= 1)) bad = "scanArrays: rows ≥ 0 and batch ≥ 1";
  arrow_src *a = &j->src;
  a->ncols = ncols;
  a->rows = (idx_t)rowsD;
  a->batch = (idx_t)batchD;
  for (uint32_t c = 0; !bad && c < ncols; c++) {
    napi_value t, nm;
    napi_typedarray_type type;
    size_t n, off;
    void *ptr;
    napi_value ab;
    napi_get_element(env, argv[4], c, &t);
    napi_get_element(env, argv[3], c, &nm);
    if (napi_get_typedarray_info(env, t, &type, &n, &ptr, &ab, &off) != napi_ok) { bad = "scanArrays: sources must be typed arrays"; break; }
    if (type == napi_float64_array) { a->width[c] = 8; a->fmt[c][0] = 'g'; }
    else if (type == napi_int32_array) { a->width[c] = 4; a->fmt[c][0] = 'i'; }
    else if (type == napi_bigint64_array) { a->width[c] = 8; a->fmt[c][0] = 'l'; }
    else { bad = "scanArrays: sources must be Float64Array, Int32Array or BigInt64Array"; break; }
    if (n < a->rows) { bad = "scanArrays: a source is shorter than the row count"; break; }
    size_t nl = 0;
    if (napi_get_value_string_utf8(env, nm, a->name[c], sizeof a->name[c], &nl) != napi_ok || nl >= sizeof a->name[c] - 1) { bad = "scanArrays: column names (at most 62 bytes)"; break; }
    a->base[c] = (uint8_t *)ptr;
    napi_create_reference(env, t, 1, &j->refs[c]);
    a->cols[c] = (struct ArrowSchema){ a->fmt[c], a->name[c], NULL, 0, 0, NULL, NULL, schema_noop, NULL };
    a->colp[c] = &a->cols[c];
  }
  if (bad) {
    for (uint32_t c = 0; c < ncols && c < MAXCOLS; c++) if (j->refs[c]) napi_delete_reference(env, j->refs[c]);
    free(j->sql);
    free(j);
    return cairn_fail(env, bad);
  }
  a->root = (struct ArrowSchema){ "+s", "", NULL, 0, ncols, a->colp, NULL, schema_noop, NULL };
  return cairn_queue(env, "cairn.scanArrays", scan_execute, scan_complete, j, &j->deferred, &j->work);
}

void cairn_register_keysort(napi_env env, napi_value exports); /* keysort.c */
void cairn_register_concsum(napi_env env, napi_value exports); /* concsum.c */

NAPI_MODULE_INIT(/* napi_env env, napi_value exports */) {
  napi_value fn;
  cairn_register_keysort(env, exports);
  cairn_register_concsum(env, exports);
  napi_create_function(env, "copyColumns", NAPI_AUTO_LENGTH, copy_columns, NULL, &fn);
  napi_set_named_property(env, exports, "copyColumns", fn);
  napi_create_function(env, "scanArrays", NAPI_AUTO_LENGTH, scan_arrays, NULL, &fn);
  napi_set_named_property(env, exports, "scanArrays", fn);
  return exports;
}
