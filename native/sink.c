/*
 * Shared by the native sinks (keysort.c, concsum.c) and the hand-off: registering a scalar
 * function that DuckDB calls on its own worker threads with each chunk of a statement's rows,
 * running a statement, and the N-API helpers of common.h.
 */
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include "common.h"

static bool register_sink(duckdb_connection conn, const char *name, const int *params, int nparams, void *extra,
                          void (*fn)(duckdb_function_info, duckdb_data_chunk, duckdb_vector)) {
  duckdb_scalar_function f = duckdb_create_scalar_function();
  duckdb_scalar_function_set_name(f, name);
  for (int i = 0; i < nparams; i++) {
    duckdb_logical_type t = duckdb_create_logical_type(params[i]);
    duckdb_scalar_function_add_parameter(f, t);
    duckdb_destroy_logical_type(&t);
  }
  duckdb_logical_type t = duckdb_create_logical_type(TYPE_INTEGER);
  duckdb_scalar_function_set_return_type(f, t);
  duckdb_destroy_logical_type(&t);
  duckdb_scalar_function_set_extra_info(f, extra, NULL);
  duckdb_scalar_function_set_function(f, fn);
  duckdb_scalar_function_set_volatile(f);
  duckdb_scalar_function_set_special_handling(f); /* rows with NULLs reach the function */
  bool ok = duckdb_register_scalar_function(conn, f) == 0;
  duckdb_destroy_scalar_function(&f);
  return ok;
}

bool cairn_run(duckdb_connection conn, const char *sql, char *error, size_t size) {
  duckdb_result res;
  memset(&res, 0, sizeof res);
  bool ok = duckdb_query(conn, sql, &res) == 0;
  if (!ok) {
    const char *e = duckdb_result_error(&res);
    snprintf(error, size, "%s", e ? e : "the statement failed");
  }
  duckdb_destroy_result(&res);
  return ok;
}

napi_value cairn_fail(napi_env env, const char *msg) {
  napi_throw_error(env, NULL, msg);
  return NULL;
}

duckdb_database cairn_database(napi_env env, napi_value handle) {
  void *holder = NULL;
  if (napi_get_value_external(env, handle, &holder) != napi_ok || !holder) return NULL;
  return *(duckdb_database *)holder;
}

char *cairn_string(napi_env env, napi_value v) {
  size_t len = 0;
  if (napi_get_value_string_utf8(env, v, NULL, 0, &len) != napi_ok) return NULL;
  char *s = malloc(len + 1);
  if (s) napi_get_value_string_utf8(env, v, s, len + 1, &len);
  return s;
}

napi_value cairn_queue(napi_env env, const char *name, napi_async_execute_callback execute, napi_async_complete_callback complete,
                       void *data, napi_deferred *deferred, napi_async_work *work) {
  napi_value promise, resource;
  napi_create_promise(env, deferred, &promise);
  napi_create_string_utf8(env, name, NAPI_AUTO_LENGTH, &resource);
  napi_create_async_work(env, NULL, resource, execute, complete, data, work);
  napi_queue_async_work(env, *work);
  return promise;
}

void cairn_reject(napi_env env, napi_deferred deferred, const char *error) {
  napi_value msg, err;
  napi_create_string_utf8(env, error, NAPI_AUTO_LENGTH, &msg);
  napi_create_error(env, NULL, msg, &err);
  napi_reject_deferred(env, deferred, err);
}

bool cairn_run_sink(duckdb_connection conn, const char *prefix, uint64_t id, const int *params, int nparams, void *extra,
                    void (*fn)(duckdb_function_info, duckdb_data_chunk, duckdb_vector), const char *sql, char *error, size_t size) {
  char name[64];
  snprintf(name, sizeof name, "%s%llu", prefix, (unsigned long long)id);
  if (!register_sink(conn, name, params, nparams, extra, fn)) {
    snprintf(error, size, "cannot register %s", name);
    return false;
  }
  char cols[256] = "";
  for (int i = 0; i < nparams && strlen(cols) < sizeof cols - 16; i++) snprintf(cols + strlen(cols), sizeof cols - strlen(cols), "%sc%d", i ? ", " : "", i);
  size_t len = strlen(sql) + 2 * strlen(cols) + 128;
  char *q = malloc(len);
  if (!q) {
    snprintf(error, size, "out of memory");
    return false;
  }
  snprintf(q, len, "SELECT sum(%s(%s)) FROM (%s) AS q(%s)", name, cols, sql, cols);
  bool ok = cairn_run(conn, q, error, size);
  free(q);
  return ok;
}
