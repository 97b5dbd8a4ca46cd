/*
 * cairn's native hand-off: copies the columns of a materialised DuckDB result into typed
 * arrays, chunk by chunk, with one memcpy per chunk and column and no JavaScript object per
 * chunk; and appends typed arrays to a table from several threads at once, each on its own
 * connection and appender. Built by scripts/build-native.mjs (optional: without it the
 * hand-off uses the bindings' per-chunk calls). It links the libduckdb.so that
 * @duckdb/node-bindings loads and uses the handles the bindings hold in N-API externals: a
 * duckdb_result*, and a pointer to a struct whose first field is the duckdb_database (the
 * layout of @duckdb/node-bindings 1.5; scripts/build-native.mjs records the version it built
 * against, and src/engine/handoff.ts does not load this library for another one).
 *
 * DuckDB C API used (duckdb.h, DuckDB 1.x): duckdb_result_chunk_count, duckdb_result_get_chunk,
 * duckdb_data_chunk_get_size, duckdb_data_chunk_get_vector, duckdb_vector_get_data,
 * duckdb_vector_get_validity, duckdb_destroy_data_chunk, duckdb_connect, duckdb_disconnect,
 * duckdb_appender_create, duckdb_append_data_chunk, duckdb_appender_error,
 * duckdb_appender_destroy, duckdb_create_logical_type, duckdb_destroy_logical_type,
 * duckdb_create_data_chunk, duckdb_data_chunk_set_size.
 */
#include <node_api.h>
#include <pthread.h>
#include <stdint.h>
#include <stdio.h>
#include <string.h>

typedef uint64_t idx_t;
/* The public result struct of duckdb.h: five deprecated fields, then the internal pointer. */
typedef struct {
  idx_t deprecated_column_count;
  idx_t deprecated_row_count;
  idx_t deprecated_rows_changed;
  void *deprecated_columns;
  char *deprecated_error_message;
  void *internal_data;
} duckdb_result;
typedef void *duckdb_data_chunk;
typedef void *duckdb_vector;

extern idx_t duckdb_result_chunk_count(duckdb_result result);
extern duckdb_data_chunk duckdb_result_get_chunk(duckdb_result result, idx_t chunk_index);
extern idx_t duckdb_data_chunk_get_size(duckdb_data_chunk chunk);
extern duckdb_vector duckdb_data_chunk_get_vector(duckdb_data_chunk chunk, idx_t col_idx);
extern void *duckdb_vector_get_data(duckdb_vector vector);
extern uint64_t *duckdb_vector_get_validity(duckdb_vector vector);
extern void duckdb_destroy_data_chunk(duckdb_data_chunk *chunk);

typedef void *duckdb_database;
typedef void *duckdb_connection;
typedef void *duckdb_appender;
typedef void *duckdb_logical_type;
typedef int duckdb_state; /* DuckDBSuccess = 0 */
enum { TYPE_INTEGER = 4, TYPE_DOUBLE = 11 }; /* duckdb_type values */
extern duckdb_state duckdb_connect(duckdb_database database, duckdb_connection *out);
extern void duckdb_disconnect(duckdb_connection *connection);
extern duckdb_state duckdb_appender_create(duckdb_connection connection, const char *schema, const char *table, duckdb_appender *out);
extern duckdb_state duckdb_append_data_chunk(duckdb_appender appender, duckdb_data_chunk chunk);
extern const char *duckdb_appender_error(duckdb_appender appender);
extern duckdb_state duckdb_appender_destroy(duckdb_appender *appender);
extern duckdb_logical_type duckdb_create_logical_type(int type);
extern void duckdb_destroy_logical_type(duckdb_logical_type *type);
extern duckdb_data_chunk duckdb_create_data_chunk(duckdb_logical_type *types, idx_t column_count);
extern void duckdb_data_chunk_set_size(duckdb_data_chunk chunk, idx_t size);

static napi_value fail(napi_env env, const char *msg) {
  napi_throw_error(env, NULL, msg);
  return NULL;
}

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
  if (napi_get_cb_info(env, info, &argc, argv, NULL, NULL) != napi_ok || argc < 3) return fail(env, "copyColumns(result, targets, widths)");
  duckdb_result *res = NULL;
  if (napi_get_value_external(env, argv[0], (void **)&res) != napi_ok || !res || !res->internal_data) return fail(env, "copyColumns: not a DuckDB result");
  uint32_t ncols = 0;
  napi_get_array_length(env, argv[1], &ncols);
  if (ncols > 64) return fail(env, "copyColumns: at most 64 columns");
  uint8_t *base[64];
  size_t cap[64];
  uint32_t width[64];
  const char *bad = typed_columns(env, argv[1], argv[2], ncols, base, width, cap);
  if (bad) {
    char msg[128];
    snprintf(msg, sizeof msg, "copyColumns: targets: %s", bad);
    return fail(env, msg);
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
        return fail(env, "copyColumns: target array too small");
      }
      duckdb_vector v = duckdb_data_chunk_get_vector(ch, j);
      if (!v) {
        duckdb_destroy_data_chunk(&ch);
        return fail(env, "copyColumns: the result has fewer columns than targets");
      }
      if (!all_valid(duckdb_vector_get_validity(v), n)) {
        duckdb_destroy_data_chunk(&ch);
        char msg[64];
        snprintf(msg, sizeof msg, "NULL in column %u", j);
        return fail(env, msg);
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

#define CHUNK 2048 /* DuckDB's vector size */

typedef struct {
  duckdb_database db;
  const char *table;
  uint32_t ncols;
  uint8_t *const *base;
  const uint32_t *width;
  idx_t from, to;
  char error[256];
} append_job;

/* Appends rows from..to of every column on a connection of its own. */
static void *append_part(void *arg) {
  append_job *j = (append_job *)arg;
  duckdb_connection conn = NULL;
  duckdb_appender app = NULL;
  duckdb_logical_type types[64];
  duckdb_data_chunk ch = NULL;
  j->error[0] = 0;
  if (duckdb_connect(j->db, &conn) != 0) {
    snprintf(j->error, sizeof j->error, "cannot open a connection");
    return NULL;
  }
  if (duckdb_appender_create(conn, NULL, j->table, &app) != 0) {
    snprintf(j->error, sizeof j->error, "cannot append to %s: %s", j->table, app ? duckdb_appender_error(app) : "no appender");
    if (app) duckdb_appender_destroy(&app);
    duckdb_disconnect(&conn);
    return NULL;
  }
  for (uint32_t c = 0; c < j->ncols; c++) types[c] = duckdb_create_logical_type(j->width[c] == 8 ? TYPE_DOUBLE : TYPE_INTEGER);
  ch = duckdb_create_data_chunk(types, j->ncols);
  for (idx_t off = j->from; off < j->to && !j->error[0]; off += CHUNK) {
    idx_t n = j->to - off < CHUNK ? j->to - off : CHUNK;
    for (uint32_t c = 0; c < j->ncols; c++) {
      memcpy(duckdb_vector_get_data(duckdb_data_chunk_get_vector(ch, c)), j->base[c] + off * j->width[c], n * j->width[c]);
    }
    duckdb_data_chunk_set_size(ch, n);
    if (duckdb_append_data_chunk(app, ch) != 0) snprintf(j->error, sizeof j->error, "append to %s: %s", j->table, duckdb_appender_error(app));
  }
  duckdb_destroy_data_chunk(&ch);
  for (uint32_t c = 0; c < j->ncols; c++) duckdb_destroy_logical_type(&types[c]);
  if (duckdb_appender_destroy(&app) != 0 && !j->error[0]) snprintf(j->error, sizeof j->error, "closing the appender of %s failed", j->table);
  duckdb_disconnect(&conn);
  return NULL;
}

/*
 * appendColumns(database, table, sources, widths, rows, threads): appends `rows` rows, column j
 * from the typed array sources[j] (widths[j] = 8: DOUBLE, 4: INTEGER), to an existing table,
 * split in `threads` row ranges appended at once. Row order across ranges is not kept.
 */
static napi_value append_columns(napi_env env, napi_callback_info info) {
  size_t argc = 6;
  napi_value argv[6];
  if (napi_get_cb_info(env, info, &argc, argv, NULL, NULL) != napi_ok || argc < 6) return fail(env, "appendColumns(database, table, sources, widths, rows, threads)");
  void *holder = NULL;
  if (napi_get_value_external(env, argv[0], &holder) != napi_ok || !holder) return fail(env, "appendColumns: not a DuckDB database");
  duckdb_database db = *(duckdb_database *)holder;
  if (!db) return fail(env, "appendColumns: the database is closed");
  char table[512];
  size_t tlen = 0;
  if (napi_get_value_string_utf8(env, argv[1], table, sizeof table, &tlen) != napi_ok || tlen >= sizeof table - 1) return fail(env, "appendColumns: table name");
  uint32_t ncols = 0;
  napi_get_array_length(env, argv[2], &ncols);
  if (ncols == 0 || ncols > 64) return fail(env, "appendColumns: 1 to 64 columns");
  uint8_t *base[64];
  uint32_t width[64];
  size_t length[64];
  double rowsD = 0;
  uint32_t threads = 1;
  napi_get_value_double(env, argv[4], &rowsD);
  napi_get_value_uint32(env, argv[5], &threads);
  idx_t rows = (idx_t)rowsD;
  const char *bad = typed_columns(env, argv[2], argv[3], ncols, base, width, length);
  if (bad) {
    char msg[128];
    snprintf(msg, sizeof msg, "appendColumns: sources: %s", bad);
    return fail(env, msg);
  }
  for (uint32_t c = 0; c < ncols; c++) if (length[c] < rows) return fail(env, "appendColumns: a source is shorter than the row count");
  if (threads < 1) threads = 1;
  if (threads > 16) threads = 16;
  if (rows < (idx_t)threads * 16 * CHUNK) threads = 1; /* small tables: one appender */
  append_job jobs[16];
  pthread_t tid[16];
  idx_t per = (rows + threads - 1) / threads;
  per = (per + CHUNK - 1) / CHUNK * CHUNK;
  for (uint32_t k = 0; k < threads; k++) {
    idx_t from = k * per < rows ? k * per : rows;
    idx_t to = from + per < rows ? from + per : rows;
    jobs[k] = (append_job){ db, table, ncols, base, width, from, to, { 0 } };
  }
  for (uint32_t k = 1; k < threads; k++) pthread_create(&tid[k], NULL, append_part, &jobs[k]);
  append_part(&jobs[0]);
  for (uint32_t k = 1; k < threads; k++) pthread_join(tid[k], NULL);
  for (uint32_t k = 0; k < threads; k++) if (jobs[k].error[0]) return fail(env, jobs[k].error);
  napi_value out;
  napi_create_double(env, (double)rows, &out);
  return out;
}

NAPI_MODULE_INIT(/* napi_env env, napi_value exports */) {
  napi_value fn;
  napi_create_function(env, "copyColumns", NAPI_AUTO_LENGTH, copy_columns, NULL, &fn);
  napi_set_named_property(env, exports, "copyColumns", fn);
  napi_create_function(env, "appendColumns", NAPI_AUTO_LENGTH, append_columns, NULL, &fn);
  napi_set_named_property(env, exports, "appendColumns", fn);
  return exports;
}
