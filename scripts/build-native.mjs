// Builds the optional native libraries with the C compiler and Node's own headers: the hand-off
// reader with the sinks that sort keys and sum concordances on DuckDB's threads
// (native/handoff.c, keysort.c, concsum.c, sink.c → build/cairn_handoff.node), linked to the
// libduckdb.so that @duckdb/node-bindings ships; the cohort kernels (native/kernels.c → build/cairn_kernels.node);
// the file-system exchange (native/fsx.c → build/cairn_fsx.node). Run by `npm ci` /
// `npm install` and `npm run build`. It never fails the install: without a compiler, headers or
// a matching DuckDB library it says why, and the hand-off uses the bindings' per-chunk calls,
// DuckDB sorts and joins itself (slower, same results) and the cohort model the WebAssembly kernels.
import { execFileSync } from "node:child_process";
import { existsSync, mkdirSync, readFileSync, rmSync, writeFileSync } from "node:fs";
import { createRequire } from "node:module";
import path from "node:path";

const root = path.resolve(path.dirname(new URL(import.meta.url).pathname), "..");
const out = path.join(root, "build", "cairn_handoff.node");
const say = (m) => process.stderr.write(`build-native: ${m}\n`);

function headers() {
  const dirs = [process.env.npm_config_nodedir, path.join(path.dirname(process.execPath), "..")].filter(Boolean).map((d) => path.join(d, "include", "node"));
  return dirs.find((d) => existsSync(path.join(d, "node_api.h")));
}

function duckdbLibDir() {
  try {
    const require = createRequire(path.join(root, "package.json"));
    const pkg = require.resolve(`@duckdb/node-bindings-${process.platform}-${process.arch}/package.json`);
    const dir = path.dirname(pkg);
    return existsSync(path.join(dir, "libduckdb.so")) ? dir : undefined;
  } catch {
    return undefined;
  }
}

/** The version of @duckdb/node-bindings whose handle layout the library is built for. */
function bindingsVersion() {
  const require = createRequire(path.join(root, "package.json"));
  return JSON.parse(readFileSync(require.resolve("@duckdb/node-bindings/package.json"), "utf8")).version;
}

rmSync(out, { force: true });
rmSync(`${out}.json`, { force: true });
const fsx = path.join(root, "build", "cairn_fsx.node");
rmSync(fsx, { force: true });
const inc = headers();
// The cohort kernels (native/kernels.c): AVX-512 or AVX2 code chosen at load time; needs only
// Node's headers and a C compiler (x86-64). No fused multiply-add beyond those written.
const kernels = path.join(root, "build", "cairn_kernels.node");
rmSync(kernels, { force: true });
if (process.env.CAIRN_NATIVE === "0") say("CAIRN_NATIVE=0: the native kernels are not built; the WebAssembly kernels run");
else if (!inc) say("Node's headers (node_api.h) not found; the native kernels are not built, the WebAssembly kernels run");
else if (process.arch !== "x64") say(`the native kernels are written for x86-64 (this is ${process.arch}); the WebAssembly kernels run`);
else {
  mkdirSync(path.dirname(kernels), { recursive: true });
  try {
    execFileSync(process.env.CC ?? "cc", ["-shared", "-fPIC", "-O3", "-ffp-contract=off", "-Wall", "-I", inc, path.join(root, "native", "kernels.c"), "-o", kernels], { stdio: "inherit" });
    say(`built ${path.relative(root, kernels)}`);
  } catch (e) {
    say(`kernels: ${e.message.split("\n")[0]}; not built, the WebAssembly kernels run`);
  }
}
// The file-system exchange (native/fsx.c): needs only Node's headers and a C compiler.
if (process.env.CAIRN_NATIVE !== "0" && inc && process.platform === "linux") {
  mkdirSync(path.dirname(fsx), { recursive: true });
  try {
    execFileSync(process.env.CC ?? "cc", ["-shared", "-fPIC", "-O2", "-Wall", "-I", inc, path.join(root, "native", "fsx.c"), "-o", fsx], { stdio: "inherit" });
    say(`built ${path.relative(root, fsx)}`);
  } catch (e) {
    say(`fsx: ${e.message.split("\n")[0]}; not built, a replaced run directory is swapped by two renames`);
  }
}
const lib = duckdbLibDir();
if (process.env.CAIRN_NATIVE === "0") say("CAIRN_NATIVE=0: not built");
else if (!inc) say("Node's headers (node_api.h) not found; not built, the hand-off uses the bindings' calls");
else if (!lib) say(`no libduckdb.so for ${process.platform}-${process.arch} in @duckdb/node-bindings; not built, the hand-off uses the bindings' calls`);
else {
  mkdirSync(path.dirname(out), { recursive: true });
  const cc = process.env.CC ?? "cc";
  try {
    // The hand-off and the native sinks (keysort.c, concsum.c) in one library. No fused
    // multiply-add: concsum.c must compute the products the SQL computes, bit for bit.
    const sources = ["handoff.c", "keysort.c", "concsum.c", "sink.c"].map((f) => path.join(root, "native", f));
    execFileSync(cc, ["-shared", "-fPIC", "-O3", "-ffp-contract=off", "-pthread", "-Wall", "-I", inc, ...sources, "-lm", "-L", lib, "-l:libduckdb.so", `-Wl,-rpath,${lib}`, "-o", out], { stdio: "inherit" });
    writeFileSync(`${out}.json`, JSON.stringify({ bindings: bindingsVersion(), node: process.version }) + "\n");
    say(`built ${path.relative(root, out)}`);
  } catch (e) {
    say(`${cc} failed (${e.message.split("\n")[0]}); not built, the hand-off uses the bindings' calls`);
  }
}
