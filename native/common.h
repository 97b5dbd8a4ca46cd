/*
 * Shared by the hand-off and the native sinks (handoff.c, keysort.c, concsum.c, sink.c): the
 * parts of DuckDB's C API they use (duckdb.h, DuckDB 1.x), declared here because
 * @duckdb/node-bindings ships the library without its header, and small N-API helpers.
 */
#ifndef CAIRN_COMMON_H
#define CAIRN_COMMON_H
#include <node_api.h>
#include <stdbool.h>
#include <stdint.h>
#include <stddef.h>

typedef uint64_t idx_t;
typedef int duckdb_state;
typedef struct {
  idx_t deprecated_column_count;
  idx_t deprecated_row_count;
  idx_t deprecated_rows_changed;
  void *deprecated_columns;
  char *deprecated_error_message;
  void *internal_data;
} duckdb_result;
typedef void *duckdb_database;
typedef void *duckdb_connection;
typedef void *duckdb_data_chunk;
typedef void *duckdb_vector;
typedef void *duckdb_scalar_function;
typedef void *duckdb_function_info;
typedef void *duckdb_logical_type;
typedef void *duckdb_appender;
enum { TYPE_BOOLEAN = 1, TYPE_INTEGER = 4, TYPE_BIGINT = 5, TYPE_UBIGINT = 9, TYPE_DOUBLE = 11 };

extern idx_t duckdb_result_chunk_count(duckdb_result result);
extern duckdb_data_chunk duckdb_result_get_chunk(duckdb_result result, idx_t chunk_index);
extern idx_t duckdb_rows_changed(duckdb_result *result);
extern duckdb_state duckdb_connect(duckdb_database database, duckdb_connection *out);
extern void duckdb_disconnect(duckdb_connection *connection);
extern duckdb_state duckdb_query(duckdb_connection connection, const char *query, duckdb_result *out);
extern const char *duckdb_result_error(duckdb_result *result);
extern void duckdb_destroy_result(duckdb_result *result);
extern idx_t duckdb_data_chunk_get_size(duckdb_data_chunk chunk);
extern duckdb_vector duckdb_data_chunk_get_vector(duckdb_data_chunk chunk, idx_t col_idx);
extern void *duckdb_vector_get_data(duckdb_vector vector);
extern uint64_t *duckdb_vector_get_validity(duckdb_vector vector);
extern duckdb_scalar_function duckdb_create_scalar_function(void);
extern void duckdb_destroy_scalar_function(duckdb_scalar_function *f);
extern void duckdb_scalar_function_set_name(duckdb_scalar_function f, const char *name);
extern void duckdb_scalar_function_add_parameter(duckdb_scalar_function f, duckdb_logical_type t);
extern void duckdb_scalar_function_set_return_type(duckdb_scalar_function f, duckdb_logical_type t);
extern void duckdb_scalar_function_set_extra_info(duckdb_scalar_function f, void *extra, void (*destroy)(void *));
extern void duckdb_scalar_function_set_function(duckdb_scalar_function f, void (*fn)(duckdb_function_info, duckdb_data_chunk, duckdb_vector));
extern void duckdb_scalar_function_set_volatile(duckdb_scalar_function f);
extern void duckdb_scalar_function_set_special_handling(duckdb_scalar_function f);
extern duckdb_state duckdb_register_scalar_function(duckdb_connection con, duckdb_scalar_function f);
extern void *duckdb_scalar_function_get_extra_info(duckdb_function_info info);
extern void duckdb_scalar_function_set_error(duckdb_function_info info, const char *error);
extern duckdb_logical_type duckdb_create_logical_type(int type);
extern void duckdb_destroy_logical_type(duckdb_logical_type *t);
extern duckdb_state duckdb_appender_create(duckdb_connection con, const char *schema, const char *table, duckdb_appender *out);
extern const char *duckdb_appender_error(duckdb_appender app);
extern duckdb_state duckdb_append_data_chunk(duckdb_appender app, duckdb_data_chunk chunk);
extern duckdb_state duckdb_appender_close(duckdb_appender app);
extern duckdb_state duckdb_appender_destroy(duckdb_appender *app);
extern duckdb_data_chunk duckdb_create_data_chunk(duckdb_logical_type *types, idx_t column_count);
extern void duckdb_destroy_data_chunk(duckdb_data_chunk *chunk);
extern void duckdb_data_chunk_set_size(duckdb_data_chunk chunk, idx_t size);
extern idx_t duckdb_vector_size(void);


/*
 * Feeds the rows of `sql` (nparams columns, of the types params) to `fn` on DuckDB's threads:
 * registers `fn` on `conn` as the scalar function <prefix><id> → INTEGER (volatile, NULLs passed
 * in, called with `extra`) and runs SELECT sum(fn(c0, …)) FROM (sql). On failure writes the
 * reason to error.
 */
bool cairn_run_sink(duckdb_connection conn, const char *prefix, uint64_t id, const int *params, int nparams, void *extra,
                    void (*fn)(duckdb_function_info, duckdb_data_chunk, duckdb_vector), const char *sql, char *error, size_t size);
/* Runs `sql` on `conn`; on failure writes DuckDB's message to error. */
bool cairn_run(duckdb_connection conn, const char *sql, char *error, size_t size);

/* Throws `msg` as a JavaScript error; returns NULL (for `return cairn_fail(…)`). */
napi_value cairn_fail(napi_env env, const char *msg);
/* The database in a @duckdb/node-bindings database handle (a struct whose first field is the duckdb_database), or NULL. */
duckdb_database cairn_database(napi_env env, napi_value handle);
/* A JavaScript string as a malloc'ed C string, or NULL. */
char *cairn_string(napi_env env, napi_value v);
/* Queues execute/complete as async work named `name` on libuv's pool; returns its promise. */
napi_value cairn_queue(napi_env env, const char *name, napi_async_execute_callback execute, napi_async_complete_callback complete,
                       void *data, napi_deferred *deferred, napi_async_work *work);
/* Rejects `deferred` with an Error of message `error`. */
void cairn_reject(napi_env env, napi_deferred deferred, const char *error);

#endif /* CAIRN_COMMON_H */
