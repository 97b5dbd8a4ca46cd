/**
 * The WebAssembly SIMD kernels (kernels.wat), with the same contracts as the TypeScript ones
 * in ../kernels.ts.
 *
 * Each thread has its own instance on a memory of its own, into which inputs are copied in
 * blocks ("staged"). Threads may also attach the shared cohort arena (../arena.ts): arrays
 * that live there, with their matrices prepared there, are computed in place, with no copy.
 */
import { setFlagsFromString } from "node:v8";
import { KERNELS_PLAIN_WASM_BASE64, KERNELS_WASM_BASE64 } from "./kernels-binary.js";
import { balanceFromOutflow } from "../balance.js";

interface Kernels {
  product(I: number, M: number, O: number, n: number, T: number): void;
  inflow(I: number, M: number, O: number, S: number, D: number, initOut: number, stock0: number, n: number, T: number): void;
  solve(Z: number, St: number, init: number, I: number, A: number, n: number, T: number, clamp: number): void;
}

/** The largest memory a kernel instance may use: 65,536 pages of 64 KiB (4 GiB, the wasm32 limit). */
export const MAX_PAGES = 65536;

let compiled: WebAssembly.Module | null = null;
let relaxed = false;

function kernelModule(): WebAssembly.Module {
  if (!compiled) {
    // Compile with the optimising tier at once: a kernel call can run for seconds, and
    // WebAssembly code is not replaced while it runs. Relaxed SIMD (the fused multiply-add)
    // is behind a flag in Node 20's engine and on by default in later ones.
    setFlagsFromString("--no-liftoff");
    setFlagsFromString("--experimental-wasm-relaxed-simd");
    const fma = Buffer.from(KERNELS_WASM_BASE64, "base64");
    relaxed = WebAssembly.validate(fma);
    compiled = new WebAssembly.Module(relaxed ? fma : Buffer.from(KERNELS_PLAIN_WASM_BASE64, "base64"));
  }
  return compiled;
}

/** Which kernel binary runs: relaxed SIMD (fused multiply-add) or plain SIMD. */
export function kernelVariant(): "relaxed-simd" | "simd" {
  kernelModule();
  return relaxed ? "relaxed-simd" : "simd";
}

function instantiate(mem: WebAssembly.Memory): Kernels {
  return new WebAssembly.Instance(kernelModule(), { env: { mem } }).exports as unknown as Kernels;
}

export function newKernelMemory(initialPages = 1): WebAssembly.Memory {
  return new WebAssembly.Memory({ initial: initialPages, maximum: MAX_PAGES, shared: true });
}

// ---- this thread's own instance: staged calls ----

let own: { k: Kernels; mem: WebAssembly.Memory } | null = null;

/** This thread's own instance, its memory grown to at least `bytes`. */
function ownKernels(bytes: number): Kernels {
  if (!own) {
    const mem = newKernelMemory();
    own = { k: instantiate(mem), mem };
  }
  const have = own.mem.buffer.byteLength;
  if (bytes > have) own.mem.grow(Math.ceil((bytes - have) / 65536));
  return own.k;
}

// ---- the shared arena: in-place calls ----

let arena: { k: Kernels; mem: WebAssembly.Memory } | null = null;
const arenaBuffers = new WeakSet<ArrayBufferLike>();
/** Byte offsets of matrices prepared in the arena: panels of a leaving matrix (see packPanels). */
const panelsOf = new WeakMap<Float64Array, number>();

/** Attaches the shared arena memory to this thread (once per thread). */
export function attachArena(mem: WebAssembly.Memory): void {
  if (arena?.mem === mem) return;
  arena = { k: instantiate(mem), mem };
}

/** A view of `length` doubles at `byteOffset` in the attached arena. */
export function arenaView(byteOffset: number, length: number): Float64Array {
  if (!arena) throw new Error("no cohort arena is attached to this thread");
  const b = arena.mem.buffer;
  arenaBuffers.add(b);
  return new Float64Array(b, byteOffset, length);
}

/** True when `a` is a view of the attached arena (made by arenaView). */
export function inArena(a: Float64Array): boolean {
  return arenaBuffers.has(a.buffer);
}

/** Byte offset of `a` in the arena, or −1 when it lives elsewhere. */
function at(a: Float64Array | null | undefined): number {
  return a && arenaBuffers.has(a.buffer) ? a.byteOffset : -1;
}

/** Records that `panels` (an arena view) holds packPanels(M). */
export function registerPanels(M: Float64Array, panels: Float64Array): void {
  panelsOf.set(M, at(panels));
}

const pad4 = (n: number) => (n + 3) & ~3;

/** Kernel calls made by this thread, in place in the arena or staged through its own memory. */
export const kernelCalls = { inPlace: 0, staged: 0 };

/** Doubles that packPanels writes for a T × T matrix. */
export function panelLength(T: number): number {
  return pad4(T) * pad4(T);
}

/** Writes M (T × T) into dst[0 ..] in panels of 4 years (the layout `product` reads). */
export function packPanels(dst: Float64Array, M: Float64Array, T: number): void {
  const tp = pad4(T);
  // Panel b holds M[c, 4b..4b+3] for every cohort c, contiguously.
  dst.fill(0, 0, tp * tp);
  for (let b = 0; b < tp / 4; b++) {
    const base = b * tp * 4;
    const cEnd = Math.min(T, 4 * b + 4);
    for (let c = 0; c < cEnd; c++) {
      const row = c * T;
      for (let j = 0; j < 4; j++) {
        const t = 4 * b + j;
        if (t < T) dst[base + c * 4 + j] = M[row + t]!;
      }
    }
  }
}

// ---- staging helpers (own instance) ----

/** Series per block: keeps each staged call's memory near 64 MiB whatever the batch size. */
function blockRows(arrays: number, T: number): number {
  return Math.max(4, Math.floor((64 * 2 ** 20) / (arrays * T * 8)) & ~3);
}

/** Copies rows s0..s0+m of a (· × T) to f[at ..], then zero rows up to np. */
function putRows(f: Float64Array, a: Float64Array, s0: number, m: number, np: number, T: number, at: number): void {
  f.set(a.subarray(s0 * T, (s0 + m) * T), at);
  f.fill(0, at + m * T, at + np * T);
}

function getRows(f: Float64Array, a: Float64Array, s0: number, m: number, T: number, at: number): void {
  a.set(f.subarray(at, at + m * T), s0 * T);
}

// ---- the kernels ----

/** out[s, t] = Σ_{c ≤ t} inp[s, c] · M[c, t] (M: T × T, zeros where c > t). */
export function wasmProduct(inp: Float64Array, n: number, T: number, M: Float64Array, out: Float64Array): void {
  const n4 = n & ~3;
  const pAt = arena ? panelsOf.get(M) : undefined;
  const iAt = at(inp), oAt = at(out);
  if (pAt !== undefined && n4 > 0 && iAt >= 0 && oAt >= 0) {
    arena!.k.product(iAt, pAt, oAt, n4, T);
    kernelCalls.inPlace++;
    if (n4 < n) wasmProduct(inp.subarray(n4 * T), n - n4, T, M, out.subarray(n4 * T));
    return;
  }
  kernelCalls.staged++;
  const mLen = panelLength(T);
  const block = Math.min(pad4(n), blockRows(2, T));
  const k = ownKernels((mLen + 2 * block * T) * 8);
  let f = new Float64Array(own!.mem.buffer);
  packPanels(f, M, T);
  const iOff = mLen, oOff = mLen + block * T;
  for (let s0 = 0; s0 < n; s0 += block) {
    const m = Math.min(block, n - s0);
    f = new Float64Array(own!.mem.buffer);
    putRows(f, inp, s0, m, pad4(m), T, iOff);
    k.product(iOff * 8, 0, oOff * 8, pad4(m), T);
    getRows(f, out, s0, m, T, oOff);
  }
}

/**
 * The inflow-driven model in one call: outflow = Σ_c I(c)·P[c, t] (+ initOut), stock by the
 * balance from stock0, stock change. Writes into `out` where given, else into new arrays.
 */
export function wasmInflow(inp: Float64Array, n: number, T: number, P: Float64Array, initOut: Float64Array | null, stock0: Float64Array | null,
  out: { outflow?: Float64Array; stock?: Float64Array; stockChange?: Float64Array } = {}): { outflow: Float64Array; stock: Float64Array; stockChange: Float64Array } {
  const outflow = out.outflow ?? new Float64Array(n * T);
  const stock = out.stock ?? new Float64Array(n * T);
  const stockChange = out.stockChange ?? new Float64Array(n * T);
  const res = { outflow, stock, stockChange };
  const n4 = n & ~3;
  const pAt = arena ? panelsOf.get(P) : undefined;
  const I = at(inp), O = at(outflow), S = at(stock), D = at(stockChange);
  if (pAt !== undefined && n4 > 0 && I >= 0 && O >= 0 && S >= 0 && D >= 0) {
    const io = initOut ? at(initOut) : 0;
    const s0 = stock0 ? at(stock0) : 0;
    kernelCalls.inPlace++;
    if (io >= 0 && s0 >= 0) arena!.k.inflow(I, pAt, O, S, D, io, s0, n4, T);
    else {
      arena!.k.product(I, pAt, O, n4, T);
      balanceFromOutflow(inp, outflow, initOut, stock0, n4, T, stock, stockChange);
    }
    if (n4 < n) {
      const tail = (a: Float64Array) => a.subarray(n4 * T);
      wasmInflow(tail(inp), n - n4, T, P, initOut && tail(initOut), stock0 && stock0.subarray(n4),
        { outflow: tail(outflow), stock: tail(stock), stockChange: tail(stockChange) });
    }
    return res;
  }
  kernelCalls.staged++;
  const mLen = panelLength(T);
  const arrays = 4 + (initOut ? 1 : 0);
  const block = Math.min(pad4(n), blockRows(arrays, T));
  const k = ownKernels((mLen + arrays * block * T + block) * 8);
  let f = new Float64Array(own!.mem.buffer);
  packPanels(f, P, T);
  const off = (j: number) => mLen + j * block * T; // doubles
  const s0Off = off(arrays);
  for (let s0 = 0; s0 < n; s0 += block) {
    const m = Math.min(block, n - s0);
    const np = pad4(m);
    f = new Float64Array(own!.mem.buffer);
    putRows(f, inp, s0, m, np, T, off(0));
    if (initOut) putRows(f, initOut, s0, m, np, T, off(4));
    if (stock0) {
      f.set(stock0.subarray(s0, s0 + m), s0Off);
      f.fill(0, s0Off + m, s0Off + np);
    }
    k.inflow(off(0) * 8, 0, off(1) * 8, off(2) * 8, off(3) * 8, initOut ? off(4) * 8 : 0, stock0 ? s0Off * 8 : 0, np, T);
    getRows(f, outflow, s0, m, T, off(1));
    getRows(f, stock, s0, m, T, off(2));
    getRows(f, stockChange, s0, m, T, off(3));
  }
  return res;
}

/** Stock-driven solve (see stockDrivenSolve in ../kernels.ts). St: T × T, row = year, column = cohort. */
export function wasmSolve(Z: Float64Array, n: number, T: number, St: Float64Array, init: Float64Array | null, clamp: boolean,
  inflow: Float64Array, achieved: Float64Array): void {
  const n4 = n & ~3;
  const zAt = at(Z), sAt = at(St), iAt = at(inflow), aAt = at(achieved), initAt = init ? at(init) : 0;
  if (arena && n4 > 0 && zAt >= 0 && sAt >= 0 && iAt >= 0 && aAt >= 0 && initAt >= 0) {
    arena.k.solve(zAt, sAt, initAt, iAt, aAt, n4, T, clamp ? 1 : 0);
    kernelCalls.inPlace++;
    if (n4 < n) {
      const tail = (a: Float64Array) => a.subarray(n4 * T);
      wasmSolve(tail(Z), n - n4, T, St, init && tail(init), clamp, tail(inflow), tail(achieved));
    }
    return;
  }
  kernelCalls.staged++;
  const arrays = init ? 4 : 3;
  const block = Math.min(pad4(n), blockRows(arrays, T));
  const k = ownKernels((T * T + arrays * block * T) * 8);
  let f = new Float64Array(own!.mem.buffer);
  f.set(St, 0);
  const zOff = T * T, iOff = zOff + block * T, aOff = iOff + block * T, initOff = aOff + block * T;
  for (let s0 = 0; s0 < n; s0 += block) {
    const m = Math.min(block, n - s0);
    const np = pad4(m);
    f = new Float64Array(own!.mem.buffer);
    putRows(f, Z, s0, m, np, T, zOff);
    if (init) putRows(f, init, s0, m, np, T, initOff);
    k.solve(zOff * 8, 0, init ? initOff * 8 : 0, iOff * 8, aOff * 8, np, T, clamp ? 1 : 0);
    getRows(f, inflow, s0, m, T, iOff);
    getRows(f, achieved, s0, m, T, aOff);
  }
}
