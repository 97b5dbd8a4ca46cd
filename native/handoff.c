/*
 * cairn's native hand-off reader: copies the columns of a materialised DuckDB result into
 * typed arrays, chunk by chunk, with one memcpy per chunk and column and no JavaScript object
 * per chunk. Built by scripts/build-native.mjs (optional: without it the hand-off uses the
 * bindings' per-chunk calls). It links the libduckdb.so that @duckdb/node-bindings loads,
 * and reads the result that the bindings hold (a duckdb_result* in a N-API external).
 *
 * DuckDB C API used (duckdb.h, DuckDB 1.x): duckdb_result_chunk_count, duckdb_result_get_chunk,
 * duckdb_data_chunk_get_size, duckdb_data_chunk_get_vector, duckdb_vector_get_data,
 * duckdb_vector_get_validity, duckdb_destroy_data_chunk.
 */
#include <node_api.h>
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
  for (uint32_t j = 0; j < ncols; j++) {
    napi_value t, w;
    napi_get_element(env, argv[1], j, &t);
    napi_get_element(env, argv[2], j, &w);
    napi_typedarray_type type;
    size_t length, offset;
    void *data;
    napi_value ab;
    if (napi_get_typedarray_info(env, t, &type, &length, &data, &ab, &offset) != napi_ok) return fail(env, "copyColumns: a target is not a typed array");
    napi_get_value_uint32(env, w, &width[j]);
    base[j] = (uint8_t *)data;
    cap[j] = length;
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

NAPI_MODULE_INIT(/* napi_env env, napi_value exports */) {
  napi_value fn;
  napi_create_function(env, "copyColumns", NAPI_AUTO_LENGTH, copy_columns, NULL, &fn);
  napi_set_named_property(env, exports, "copyColumns", fn);
  return exports;
}
