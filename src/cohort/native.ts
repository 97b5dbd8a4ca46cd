/**
 * The optional native cohort kernels (native/kernels.c, built at install into
 * build/cairn_kernels.node when a C compiler and Node's headers are present): the contracts of
 * the WebAssembly kernels, with the CPU's full vector width (AVX-512 or AVX2 with FMA, chosen
 * when the library loads). They take Float64Arrays wherever they live, the shared cohort arena
 * included, so they need neither staging nor the arena's panel layout. Not a DuckDB library:
 * the cohort core stays free of the database.
 *
 * CAIRN_KERNELS=wasm (or ts) does not load them; CAIRN_NATIVE=0 neither builds nor loads them.
 */
import { existsSync } from "node:fs";
import { createRequire } from "node:module";

export interface NativeKernels {
  /** out[s, t] = Σ_{c ≤ t} I[s, c] · M[c, t] (M: T × T). */
  product(I: Float64Array, M: Float64Array, O: Float64Array, n: number, T: number): void;
  /** Outflow (+ initOut), stock from stock0 by the balance, stock change. */
  inflow(I: Float64Array, M: Float64Array, O: Float64Array, S: Float64Array, D: Float64Array, initOut: Float64Array | null, stock0: Float64Array | null, n: number, T: number): void;
  /** The stock-driven solve (St: T × T, row = year, column = cohort). */
  solve(Z: Float64Array, St: Float64Array, init: Float64Array | null, I: Float64Array, A: Float64Array, n: number, T: number, clamp: boolean): void;
  /** The instruction set in use and the cache sizes the system reports (bytes; 0 when unknown). */
  info(): { isa: "avx512" | "avx2" | "none"; l1d: number; l2: number; l3: number };
  /** Asks for transparent huge pages under the array's whole 2 MiB pages (before its first write); returns the bytes advised. */
  adviseHugePages(a: ArrayBufferView): number;
}

let loaded: NativeKernels | null | undefined;

/** The library itself when built and loadable (whatever the CPU), else null. */
function library(): NativeKernels | null {
  if (loaded === undefined) {
    loaded = null;
    const file = new URL("../../build/cairn_kernels.node", import.meta.url);
    if (process.env.CAIRN_NATIVE !== "0" && existsSync(file)) {
      try {
        loaded = createRequire(import.meta.url)(file.pathname) as NativeKernels;
      } catch {
        loaded = null; // built for another Node: the WebAssembly kernels do the same work
      }
    }
  }
  return loaded;
}

/** The native kernels when built and usable on this CPU (and not turned off), else null. */
export function nativeKernels(): NativeKernels | null {
  const k = library();
  return k && k.info().isa !== "none" ? k : null;
}

/**
 * A new zero-filled Float64Array (or Int32Array) whose whole 2 MiB pages the kernel is asked to
 * back with huge pages before anything touches them (Linux, native library built; otherwise a
 * plain array). On a host where a page fault is dear (measured here: a first write of 80 MB
 * in 4 KiB pages took 0.22 s, in 2 MiB pages 0.01-0.14 s), this is most of the cost of filling
 * a large array. Only for arrays of at least 4 MiB; smaller ones are plain.
 */
export function largeFloat64Array(n: number): Float64Array {
  return advised(new Float64Array(n));
}
export function largeInt32Array(n: number): Int32Array {
  return advised(new Int32Array(n));
}
function advised<A extends ArrayBufferView>(a: A): A {
  if (a.byteLength >= 4 << 20) library()?.adviseHugePages(a);
  return a;
}
