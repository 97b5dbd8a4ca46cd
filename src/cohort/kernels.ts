import { kernelVariant, wasmInflow, wasmProduct, wasmSolve } from "./wasm/index.js";
import { nativeKernels } from "./native.js";

/**
 * Batched numeric kernels over many series at once (row-major series × years Float64Arrays).
 * A cell is one series × year × cohort term. Three implementations with one contract: native
 * (native/kernels.c, AVX-512 or AVX2, when built), WebAssembly SIMD (wasm/kernels.wat, always
 * there) and plain TypeScript (the reference the others are tested against).
 */

/** Rounds up to a multiple of 4. */
export function pad4(n: number): number {
  return (n + 3) & ~3;
}

/**
 * out[s, t] = Σ_{c ≤ t} inp[s, c] · M[c, t] for s < n, t < T, with 4 × 4 register blocking.
 * `M` is T × T row-major (row = cohort c, column = year t) with zeros where c > t.
 * `inp` and `out` are n × T row-major.
 */
export function cohortProduct(inp: Float64Array, n: number, T: number, M: Float64Array, out: Float64Array): void {
  if (kind === "native") return nativeKernels()!.product(inp, M, out, n, T);
  if (kind === "wasm") return wasmProduct(inp, n, T, M, out);
  cohortProductTS(inp, n, T, M, out);
}

export type KernelKind = "native" | "wasm" | "ts";

/**
 * Which kernels run: native when built (the default), else WebAssembly SIMD; CAIRN_KERNELS=wasm
 * or =ts (or setKernels, e.g. to compare them in tests) chooses one. "native" where the native
 * kernels are not built means WebAssembly.
 */
let kind: KernelKind = pick((process.env.CAIRN_KERNELS as KernelKind | undefined) ?? "native");
function pick(k: KernelKind): KernelKind {
  if (k === "ts") return "ts";
  if (k === "wasm") return "wasm";
  return nativeKernels() ? "native" : "wasm";
}
export function setKernels(k: KernelKind): void {
  kind = pick(k);
}
/** True when compiled kernels run (native or WebAssembly), false for the TypeScript ones. */
export function wasmKernels(): boolean {
  return kind !== "ts";
}
export function kernelKind(): KernelKind {
  return kind;
}
/** The kernels in use, in words: "native AVX-512", "WebAssembly relaxed-simd", "TypeScript". */
export function kernelDescription(): string {
  if (kind === "native") return `native ${nativeKernels()!.info().isa === "avx512" ? "AVX-512" : "AVX2"}`;
  if (kind === "wasm") return `WebAssembly ${kernelVariant()}`;
  return "TypeScript";
}

/**
 * The inflow-driven model in one call (compiled kernels: native or WebAssembly): outflow =
 * Σ_c I(c)·P[c, t] (+ initOut), stock by the balance from stock0, stock change. Writes into
 * `out` where given, else into new arrays.
 */
export function inflowKernel(inp: Float64Array, n: number, T: number, P: Float64Array, initOut: Float64Array | null, stock0: Float64Array | null,
  out: { outflow?: Float64Array; stock?: Float64Array; stockChange?: Float64Array } = {}): { outflow: Float64Array; stock: Float64Array; stockChange: Float64Array } {
  if (kind !== "native") return wasmInflow(inp, n, T, P, initOut, stock0, out);
  const outflow = out.outflow ?? new Float64Array(n * T);
  const stock = out.stock ?? new Float64Array(n * T);
  const stockChange = out.stockChange ?? new Float64Array(n * T);
  nativeKernels()!.inflow(inp, P, outflow, stock, stockChange, initOut, stock0, n, T);
  return { outflow, stock, stockChange };
}

/** The plain TypeScript kernel, 4 × 4 register blocking. */
export function cohortProductTS(inp: Float64Array, n: number, T: number, M: Float64Array, out: Float64Array): void {
  const Tp = pad4(T);
  // Padded copies make every block full; cost O(n·T), negligible beside O(n·T²).
  const Mp = T === Tp ? M : padMatrix(M, T, Tp);
  const np = pad4(n);
  const I = n === np && T === Tp ? inp : padRows(inp, n, T, np, Tp);
  const O = n === np && T === Tp ? out : new Float64Array(np * Tp);
  for (let s0 = 0; s0 < np; s0 += 4) {
    const r0 = s0 * Tp;
    const r1 = r0 + Tp;
    const r2 = r1 + Tp;
    const r3 = r2 + Tp;
    for (let t0 = 0; t0 < Tp; t0 += 4) {
      let a00 = 0, a01 = 0, a02 = 0, a03 = 0;
      let a10 = 0, a11 = 0, a12 = 0, a13 = 0;
      let a20 = 0, a21 = 0, a22 = 0, a23 = 0;
      let a30 = 0, a31 = 0, a32 = 0, a33 = 0;
      const cEnd = Math.min(t0 + 4, Tp);
      for (let c = 0; c < cEnd; c++) {
        const m = c * Tp + t0;
        const m0 = Mp[m]!, m1 = Mp[m + 1]!, m2 = Mp[m + 2]!, m3 = Mp[m + 3]!;
        const i0 = I[r0 + c]!, i1 = I[r1 + c]!, i2 = I[r2 + c]!, i3 = I[r3 + c]!;
        a00 += i0 * m0; a01 += i0 * m1; a02 += i0 * m2; a03 += i0 * m3;
        a10 += i1 * m0; a11 += i1 * m1; a12 += i1 * m2; a13 += i1 * m3;
        a20 += i2 * m0; a21 += i2 * m1; a22 += i2 * m2; a23 += i2 * m3;
        a30 += i3 * m0; a31 += i3 * m1; a32 += i3 * m2; a33 += i3 * m3;
      }
      O[r0 + t0] = a00; O[r0 + t0 + 1] = a01; O[r0 + t0 + 2] = a02; O[r0 + t0 + 3] = a03;
      O[r1 + t0] = a10; O[r1 + t0 + 1] = a11; O[r1 + t0 + 2] = a12; O[r1 + t0 + 3] = a13;
      O[r2 + t0] = a20; O[r2 + t0 + 1] = a21; O[r2 + t0 + 2] = a22; O[r2 + t0 + 3] = a23;
      O[r3 + t0] = a30; O[r3 + t0 + 1] = a31; O[r3 + t0 + 2] = a32; O[r3 + t0 + 3] = a33;
    }
  }
  if (O !== out) for (let s = 0; s < n; s++) out.set(O.subarray(s * Tp, s * Tp + T), s * T);
}

function padMatrix(M: Float64Array, T: number, Tp: number): Float64Array {
  const P = new Float64Array(Tp * Tp);
  for (let c = 0; c < T; c++) P.set(M.subarray(c * T, c * T + T), c * Tp);
  return P;
}

function padRows(A: Float64Array, n: number, T: number, np: number, Tp: number): Float64Array {
  const P = new Float64Array(np * Tp);
  for (let s = 0; s < n; s++) P.set(A.subarray(s * T, s * T + T), s * Tp);
  return P;
}

/**
 * Stock-driven solve: for each series, year by year,
 *   I(t) = [Z(t) − Σ_{c<t} I(c)·St[t, c] − init(t)] / St[t, t]
 * where St is the transpose of the survival matrix (row = year t, column = cohort c).
 * With clamp, a negative I(t) is set to 0. Returns the achieved stock in `achieved`.
 */
export function stockDrivenSolve(Z: Float64Array, n: number, T: number, St: Float64Array, init: Float64Array | null,
  clamp: boolean, inflow: Float64Array, achieved: Float64Array): void {
  if (kind === "native") return nativeKernels()!.solve(Z, St, init, inflow, achieved, n, T, clamp);
  if (kind === "wasm") return wasmSolve(Z, n, T, St, init, clamp, inflow, achieved);
  stockDrivenSolveTS(Z, n, T, St, init, clamp, inflow, achieved);
}

export function stockDrivenSolveTS(Z: Float64Array, n: number, T: number, St: Float64Array, init: Float64Array | null,
  clamp: boolean, inflow: Float64Array, achieved: Float64Array): void {
  for (let s0 = 0; s0 < n; s0 += 4) {
    const k = Math.min(4, n - s0);
    const r0 = s0 * T;
    const r1 = k > 1 ? r0 + T : r0;
    const r2 = k > 2 ? r0 + 2 * T : r0;
    const r3 = k > 3 ? r0 + 3 * T : r0;
    for (let t = 0; t < T; t++) {
      let a0 = 0, a1 = 0, a2 = 0, a3 = 0;
      const row = t * T;
      for (let c = 0; c < t; c++) {
        const m = St[row + c]!;
        a0 += inflow[r0 + c]! * m;
        a1 += inflow[r1 + c]! * m;
        a2 += inflow[r2 + c]! * m;
        a3 += inflow[r3 + c]! * m;
      }
      const d = St[row + t]!;
      const acc = [a0, a1, a2, a3];
      const rows = [r0, r1, r2, r3];
      for (let j = 0; j < k; j++) {
        const r = rows[j]!;
        const base = acc[j]! + (init ? init[r + t]! : 0);
        let x = (Z[r + t]! - base) / d;
        if (clamp && x < 0) x = 0;
        inflow[r + t] = x;
        achieved[r + t] = base + x * d;
      }
    }
  }
}
