/*
 * cairn's file-system exchange: swaps two paths in one step with renameat2(RENAME_EXCHANGE)
 * (Linux ≥ 3.15, on ext4, xfs, btrfs, tmpfs and others), so a replaced run directory is never
 * absent. Built by scripts/build-native.mjs; optional: without it (or where the file system
 * refuses the flag) the swap falls back to two renames, which the next run repairs if
 * interrupted (README, "Run directories").
 */
#define _GNU_SOURCE
#include <node_api.h>
#include <errno.h>
#include <fcntl.h>
#include <string.h>
#include <sys/syscall.h>
#include <unistd.h>

#ifndef RENAME_EXCHANGE
#define RENAME_EXCHANGE (1 << 1)
#endif

static napi_value exchange(napi_env env, napi_callback_info info) {
  size_t argc = 2;
  napi_value argv[2];
  napi_get_cb_info(env, info, &argc, argv, NULL, NULL);
  char a[4096], b[4096];
  size_t la, lb;
  if (argc < 2 || napi_get_value_string_utf8(env, argv[0], a, sizeof a, &la) != napi_ok || napi_get_value_string_utf8(env, argv[1], b, sizeof b, &lb) != napi_ok) {
    napi_throw_type_error(env, NULL, "exchange(a, b) takes two paths");
    return NULL;
  }
  long r = syscall(SYS_renameat2, AT_FDCWD, a, AT_FDCWD, b, RENAME_EXCHANGE);
  napi_value out;
  /* 0 on success, else the errno (EINVAL or ENOSYS: not supported here, so the caller falls back). */
  napi_create_int32(env, r == 0 ? 0 : errno, &out);
  return out;
}

NAPI_MODULE_INIT() {
  napi_value fn;
  napi_create_function(env, "exchange", NAPI_AUTO_LENGTH, exchange, NULL, &fn);
  napi_set_named_property(env, exports, "exchange", fn);
  return exports;
}
