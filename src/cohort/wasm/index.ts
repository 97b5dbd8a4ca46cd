/**
 * The WebAssembly SIMD kernels (kernels.wat), with the same contracts as the TypeScript ones
 * in ../kernels.ts. One instance per thread; inputs are copied into its memory in blocks.
 */
import { setFlagsFromString } from "node:v8";
import { KERNELS_WASM_BASE64 } from "./kernels-binary.js";

interface Kernels {
  mem: WebAssembly.Memory;
  product(I: number, M: number, O: number, np: number, tp: number): void;
  inflow(I: number, M: number, O: number, S: number, D: number, initOut: number, stock0: number, np: number, tp: number): void;
  solve(Z: number, St: number, init: number, I: number, A: number, np: number, T: number, clamp: number): void;
}

let inst: Kernels | null = null;

function kernels(): Kernels {
  if (!inst) {
    // Compile with the optimising tier at once: a kernel call can run for seconds, and
    // WebAssembly code is not replaced while it runs.
    setFlagsFromString("--no-liftoff");
    const mod = new WebAssembly.Module(Buffer.from(KERNELS_WASM_BASE64, "base64"));
    const i = new WebAssembly.Instance(mod, {});
    inst = i.exports as unknown as Kernels;
  }
  return inst;
}

function ensureBytes(k: Kernels, bytes: number): void {
  const have = k.mem.buffer.byteLength;
  if (bytes > have) k.mem.grow(Math.ceil((bytes - have) / 65536));
}

const pad4 = (n: number) => (n + 3) & ~3;
/** Series per block: keeps each call's memory near 64 MiB whatever the batch size. */
function blockRows(rowBytes: number): number {
  return Math.max(4, Math.floor((64 * 2 ** 20) / (2 * rowBytes)) & ~3);
}

/** Writes M (T × T) into wasm memory at double offset 0 in panels of 4 years. */
function packPanels(f: Float64Array, M: Float64Array, T: number, tp: number): void {
  // Panel b holds M[c, 4b..4b+3] for every cohort c, contiguously.
  f.fill(0, 0, tp * tp);
  for (let b = 0; b < tp / 4; b++) {
    const base = b * tp * 4;
    const cEnd = Math.min(T, 4 * b + 4);
    for (let c = 0; c < cEnd; c++) {
      const row = c * T;
      for (let j = 0; j < 4; j++) {
        const t = 4 * b + j;
        if (t < T) f[base + c * 4 + j] = M[row + t]!;
      }
    }
  }
}

/** Copies rows s0..s0+m of a (n × T) into wasm memory at double offset `at`, padded to tp columns and np rows. */
function putRows(f: Float64Array, a: Float64Array, s0: number, m: number, np: number, T: number, tp: number, at: number): void {
  if (T === tp) f.set(a.subarray(s0 * T, (s0 + m) * T), at);
  else for (let s = 0; s < m; s++) {
    f.set(a.subarray((s0 + s) * T, (s0 + s) * T + T), at + s * tp);
    f.fill(0, at + s * tp + T, at + (s + 1) * tp);
  }
  f.fill(0, at + m * tp, at + np * tp);
}

function getRows(f: Float64Array, a: Float64Array, s0: number, m: number, T: number, tp: number, at: number): void {
  if (T === tp) a.set(f.subarray(at, at + m * T), s0 * T);
  else for (let s = 0; s < m; s++) a.set(f.subarray(at + s * tp, at + s * tp + T), (s0 + s) * T);
}

/** out[s, t] = Σ_{c ≤ t} inp[s, c] · M[c, t] (M: T × T, zeros where c > t). */
export function wasmProduct(inp: Float64Array, n: number, T: number, M: Float64Array, out: Float64Array): void {
  const k = kernels();
  const tp = pad4(T);
  const mBytes = tp * tp * 8;
  const rowBytes = tp * 8;
  const block = Math.min(pad4(n), blockRows(rowBytes));
  ensureBytes(k, mBytes + 2 * block * rowBytes);
  let f = new Float64Array(k.mem.buffer);
  packPanels(f, M, T, tp);
  const iOff = mBytes;
  const oOff = mBytes + block * rowBytes;
  for (let s0 = 0; s0 < n; s0 += block) {
    const m = Math.min(block, n - s0);
    const np = pad4(m);
    f = new Float64Array(k.mem.buffer);
    putRows(f, inp, s0, m, np, T, tp, iOff / 8);
    k.product(iOff, 0, oOff, np, tp);
    getRows(f, out, s0, m, T, tp, oOff / 8);
  }
}

/** Stock-driven solve (see stockDrivenSolve in ../kernels.ts). */
/**
 * The inflow-driven model in one call: outflow = Σ_c I(c)·P[c, t] (+ initOut), stock by the
 * balance from stock0, stock change. Returns new arrays.
 */
export function wasmInflow(inp: Float64Array, n: number, T: number, P: Float64Array, initOut: Float64Array | null, stock0: Float64Array | null,
  out: { outflow?: Float64Array; stock?: Float64Array; stockChange?: Float64Array } = {}): { outflow: Float64Array; stock: Float64Array; stockChange: Float64Array } {
  const k = kernels();
  const tp = pad4(T);
  const mBytes = tp * tp * 8;
  const rowBytes = tp * 8;
  const arrays = 4 + (initOut ? 1 : 0);
  const block = Math.min(pad4(n), Math.max(4, Math.floor((64 * 2 ** 20) / (arrays * rowBytes)) & ~3));
  ensureBytes(k, mBytes + arrays * block * rowBytes + block * 8 + 64);
  let f = new Float64Array(k.mem.buffer);
  packPanels(f, P, T, tp);
  const at = (j: number) => mBytes + j * block * rowBytes; // bytes
  const s0Off = at(arrays);
  const outflow = out.outflow ?? new Float64Array(n * T);
  const stock = out.stock ?? new Float64Array(n * T);
  const stockChange = out.stockChange ?? new Float64Array(n * T);
  for (let s0 = 0; s0 < n; s0 += block) {
    const m = Math.min(block, n - s0);
    const np = pad4(m);
    f = new Float64Array(k.mem.buffer);
    putRows(f, inp, s0, m, np, T, tp, at(0) / 8);
    if (initOut) putRows(f, initOut, s0, m, np, T, tp, at(4) / 8);
    if (stock0) {
      f.set(stock0.subarray(s0, s0 + m), s0Off / 8);
      f.fill(0, s0Off / 8 + m, s0Off / 8 + np);
    }
    k.inflow(at(0), 0, at(1), at(2), at(3), initOut ? at(4) : 0, stock0 ? s0Off : 0, np, tp);
    getRows(f, outflow, s0, m, T, tp, at(1) / 8);
    getRows(f, stock, s0, m, T, tp, at(2) / 8);
    getRows(f, stockChange, s0, m, T, tp, at(3) / 8);
  }
  return { outflow, stock, stockChange };
}

export function wasmSolve(Z: Float64Array, n: number, T: number, St: Float64Array, init: Float64Array | null, clamp: boolean,
  inflow: Float64Array, achieved: Float64Array): void {
  const k = kernels();
  const rowBytes = T * 8;
  const stBytes = T * T * 8;
  const block = Math.min(pad4(n), Math.max(4, Math.floor((64 * 2 ** 20) / (4 * rowBytes)) & ~3));
  const arrays = init ? 4 : 3;
  ensureBytes(k, stBytes + (arrays + 1) * block * rowBytes + 64);
  let f = new Float64Array(k.mem.buffer);
  f.set(St, 0);
  const zOff = stBytes;
  const iOff = zOff + block * rowBytes;
  const aOff = iOff + block * rowBytes;
  const initOff = init ? aOff + block * rowBytes : 0;
  for (let s0 = 0; s0 < n; s0 += block) {
    const m = Math.min(block, n - s0);
    const np = pad4(m);
    f = new Float64Array(k.mem.buffer);
    f.set(Z.subarray(s0 * T, (s0 + m) * T), zOff / 8);
    f.fill(0, zOff / 8 + m * T, zOff / 8 + np * T);
    f.fill(0, iOff / 8, iOff / 8 + np * T);
    if (init) {
      f.set(init.subarray(s0 * T, (s0 + m) * T), initOff / 8);
      f.fill(0, initOff / 8 + m * T, initOff / 8 + np * T);
    }
    k.solve(zOff, 0, initOff, iOff, aOff, np, T, clamp ? 1 : 0);
    inflow.set(f.subarray(iOff / 8, iOff / 8 + m * T), s0 * T);
    achieved.set(f.subarray(aOff / 8, aOff / 8 + m * T), s0 * T);
  }
}
