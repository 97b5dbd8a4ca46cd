/*
 * Shared by the native sinks (keysort.c, concsum.c): registering a scalar function that DuckDB
 * calls on its own worker threads with each chunk of a statement's rows, and running a statement.
 */
#include <stdio.h>
#include <string.h>
#include "duckdb_api.h"

bool cairn_register_sink(duckdb_connection conn, const char *name, const int *params, int nparams, void *extra,
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
