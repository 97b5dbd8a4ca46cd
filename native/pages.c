/*
 * Huge pages for DuckDB's working memory. DuckDB allocates through the jemalloc it carries
 * (symbols prefixed duckdb_je_); that jemalloc is built without transparent-huge-page support,
 * so on a kernel whose THP mode is "madvise" its memory is faulted in 4 KiB pages. On this
 * project's machine (a virtual machine) each such fault costs about 10 µs, a 2 MiB fault about
 * 0.1 ms: sorting 10^8 key hashes faulted 630,000 pages, 6 of its 9 seconds (README,
 * "Why the two hosts differ").
 *
 * jemalloc's documented extension point is the extent hook table of an arena
 * (mallctl "arena.<i>.extent_hooks"). We install, on every arena, a copy of the arena's own
 * hooks whose alloc calls the original and then madvise(MADV_HUGEPAGE) on the new extent;
 * everything else (purge, split, merge, …) stays jemalloc's. Arenas created later (the one
 * jemalloc keeps for very large allocations is made on first use) are covered by a
 * throw-away allocation above DuckDB's oversize threshold before the hooks are set.
 *
 * The hook table layout is jemalloc 5's (include/jemalloc/jemalloc_typedefs.h); the
 * @duckdb/node-bindings version is pinned by scripts/build-native.mjs like the rest of this
 * library.
 */
#define _GNU_SOURCE
#include <node_api.h>
#include <stdbool.h>
#include <stdint.h>
#include <stdio.h>
#include <string.h>
#include <sys/mman.h>

extern int duckdb_je_mallctl(const char *name, void *oldp, size_t *oldlenp, void *newp, size_t newlen) __attribute__((weak));
extern void *duckdb_je_malloc(size_t size) __attribute__((weak));
extern void duckdb_je_free(void *p) __attribute__((weak));

typedef struct extent_hooks_s extent_hooks_t;
struct extent_hooks_s {
  void *(*alloc)(extent_hooks_t *, void *, size_t, size_t, bool *, bool *, unsigned);
  bool (*dalloc)(extent_hooks_t *, void *, size_t, bool, unsigned);
  void (*destroy)(extent_hooks_t *, void *, size_t, bool, unsigned);
  bool (*commit)(extent_hooks_t *, void *, size_t, size_t, size_t, unsigned);
  bool (*decommit)(extent_hooks_t *, void *, size_t, size_t, size_t, unsigned);
  bool (*purge_lazy)(extent_hooks_t *, void *, size_t, size_t, size_t, unsigned);
  bool (*purge_forced)(extent_hooks_t *, void *, size_t, size_t, size_t, unsigned);
  bool (*split)(extent_hooks_t *, void *, size_t, size_t, size_t, bool, unsigned);
  bool (*merge)(extent_hooks_t *, void *, size_t, void *, size_t, bool, unsigned);
};

#define HUGE_PAGE ((size_t)2 << 20)
static extent_hooks_t *original;  /* jemalloc's default table (the same for every arena) */
static extent_hooks_t advised;    /* a copy of it with alloc below */
static size_t advisedBytes;

static void *alloc_advised(extent_hooks_t *h, void *addr, size_t size, size_t align, bool *zero, bool *commit, unsigned arena) {
  (void)h;
  void *p = original->alloc(original, addr, size, align, zero, commit, arena);
  if (p && size >= HUGE_PAGE && madvise(p, size, MADV_HUGEPAGE) == 0) __atomic_add_fetch(&advisedBytes, size, __ATOMIC_RELAXED);
  return p;
}

/*
 * Installs the hooks; returns the number of arenas hooked (0: not possible here: no jemalloc
 * symbols, or an arena with hooks of someone else's), or -1 when already done.
 */
static int install(void) {
  if (original) return -1;
  if (!duckdb_je_mallctl || !duckdb_je_malloc || !duckdb_je_free) return 0;
  /* The arena for allocations above the oversize threshold (DuckDB: 256 MiB) exists only once
     used: one untouched allocation makes it (no page is faulted in). */
  size_t big = (size_t)1 << 29;
  void *p = duckdb_je_malloc(big);
  if (p) duckdb_je_free(p);
  unsigned n = 0;
  size_t sz = sizeof n;
  if (duckdb_je_mallctl("arenas.narenas", &n, &sz, NULL, 0) != 0) return 0;
  int hooked = 0;
  for (unsigned i = 0; i < n; i++) {
    char name[64];
    snprintf(name, sizeof name, "arena.%u.extent_hooks", i);
    extent_hooks_t *old = NULL;
    sz = sizeof old;
    if (duckdb_je_mallctl(name, &old, &sz, NULL, 0) != 0 || !old) continue; /* not created: never used */
    if (!original) {
      original = old;
      advised = *old;
      advised.alloc = alloc_advised;
    }
    if (old != original) continue; /* someone else's hooks: leave them */
    extent_hooks_t *mine = &advised;
    if (duckdb_je_mallctl(name, NULL, NULL, &mine, sizeof mine) == 0) hooked++;
  }
  return hooked;
}

static napi_value js_install(napi_env env, napi_callback_info info) {
  (void)info;
  napi_value out;
  napi_create_int32(env, install(), &out);
  return out;
}

static napi_value js_advised(napi_env env, napi_callback_info info) {
  (void)info;
  napi_value out;
  napi_create_double(env, (double)__atomic_load_n(&advisedBytes, __ATOMIC_RELAXED), &out);
  return out;
}

void cairn_register_pages(napi_env env, napi_value exports) {
  napi_value fn;
  napi_create_function(env, "adviseEngineHugePages", NAPI_AUTO_LENGTH, js_install, NULL, &fn);
  napi_set_named_property(env, exports, "adviseEngineHugePages", fn);
  napi_create_function(env, "engineHugePageBytes", NAPI_AUTO_LENGTH, js_advised, NULL, &fn);
  napi_set_named_property(env, exports, "engineHugePageBytes", fn);
}
