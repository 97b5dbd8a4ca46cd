import { describe, expect, it } from "vitest";
import { spawnSync } from "node:child_process";
import path from "node:path";
import { nativeKernels } from "../../src/cohort/native.js";
import { cohortProductTS, kernelKind, setKernels, stockDrivenSolveTS } from "../../src/cohort/kernels.js";
import { kernelVariant, wasmInflow, wasmProduct } from "../../src/cohort/wasm/index.js";
import { KernelArena } from "../../src/cohort/arena.js";
import { CohortGroup, curveOf, inflowDriven, makeLifetime, stockDriven } from "../../src/cohort/index.js";
import { runTasks, taskFor, CohortPool } from "../../src/cohort/pool.js";
import { mulberry32 } from "../../src/data/prng.js";
import { ROOT } from "../helpers.js";

const k = nativeKernels();

function triangular(T: number, f: (c: number, t: number) => number): Float64Array {
  const M = new Float64Array(T * T);
  for (let c = 0; c < T; c++) for (let t = c; t < T; t++) M[c * T + t] = f(c, t);
  return M;
}

/** Plain sums, term by term (the definition of the product), for the check against the kernels. */
function plainProduct(I: Float64Array, n: number, T: number, M: Float64Array): Float64Array {
  const out = new Float64Array(n * T);
  for (let s = 0; s < n; s++) for (let t = 0; t < T; t++) {
    let a = 0;
    for (let c = 0; c <= t; c++) a += I[s * T + c]! * M[c * T + t]!;
    out[s * T + t] = a;
  }
  return out;
}

// Sizes around the blocks (8 series × 16 years with AVX-512, 6 × 8 with AVX2) and their edges.
const SIZES = [[1, 1], [1, 9], [5, 7], [8, 16], [9, 17], [13, 61], [37, 203], [6, 401]] as const;

describe.skipIf(!k)("native kernels (native/kernels.c)", () => {
  it("report the instruction set and the caches", () => {
    const info = k!.info();
    expect(["avx512", "avx2"]).toContain(info.isa);
    expect(info.l1d).toBeGreaterThanOrEqual(0);
  });

  it.each(SIZES)("product, %i series × %i years: the plain sums, and the TypeScript kernel", (n, T) => {
    const rnd = mulberry32(n * 1000 + T);
    const I = new Float64Array(n * T).map(() => rnd() * 100);
    const M = triangular(T, (c, t) => Math.exp(-(t - c) / 9) * (1 + c / T));
    const a = new Float64Array(n * T);
    k!.product(I, M, a, n, T);
    const plain = plainProduct(I, n, T, M);
    const ts = new Float64Array(n * T);
    cohortProductTS(I, n, T, M, ts);
    // Positive terms: each result within a few roundings of the plain sum (1e-15 relative per
    // term is the double precision of one fused or unfused multiply-add; the sums have ≤ 401 terms).
    for (let i = 0; i < n * T; i++) {
      expect(Math.abs(a[i]! - plain[i]!)).toBeLessThanOrEqual(1e-13 * plain[i]! + 1e-300);
      expect(Math.abs(a[i]! - ts[i]!)).toBeLessThanOrEqual(1e-13 * ts[i]! + 1e-300);
    }
  });

  it.each(SIZES)("inflow-driven, %i series × %i years, with an initial stock: bit for bit the WebAssembly kernel (fused multiply-add)", (n, T) => {
    if (kernelVariant() !== "relaxed-simd") return; // the plain-SIMD binary rounds each product apart
    const rnd = mulberry32(n * 7 + T);
    const P = triangular(T, (c, t) => Math.exp(-(t - c) / 7) / 7);
    const I = new Float64Array(n * T).map(() => rnd() * 100);
    const initOut = new Float64Array(n * T).map(() => rnd());
    const stock0 = new Float64Array(n).map(() => 500 * rnd());
    const w = wasmInflow(I, n, T, P, initOut, stock0);
    const o = new Float64Array(n * T), s = new Float64Array(n * T), d = new Float64Array(n * T);
    k!.inflow(I, P, o, s, d, initOut, stock0, n, T);
    expect(Array.from(o)).toEqual(Array.from(w.outflow));
    expect(Array.from(s)).toEqual(Array.from(w.stock));
    expect(Array.from(d)).toEqual(Array.from(w.stockChange));
    // The balance holds as the TypeScript one computes it: S[t] = (S[t − 1] + I[t]) − O[t].
    for (let r = 0; r < n; r++) {
      let prev = stock0[r]!;
      for (let t = 0; t < T; t++) {
        const i = r * T + t;
        expect(s[i]).toBe(prev + I[i]! - o[i]!);
        expect(d[i]).toBe(s[i]! - prev);
        prev = s[i]!;
      }
    }
    const p2 = new Float64Array(n * T);
    wasmProduct(I, n, T, P, p2);
    for (let i = 0; i < n * T; i++) expect(o[i]).toBe(p2[i]! + initOut[i]!);
  });

  it.each([[1, 5, false], [6, 31, true], [17, 120, false], [20, 203, true]] as const)("stock-driven solve, %i series × %i years (clamp %s): the TypeScript solve", (n, T, clamp) => {
    const rnd = mulberry32(n + T);
    const St = new Float64Array(T * T);
    for (let t = 0; t < T; t++) for (let c = 0; c <= t; c++) St[t * T + c] = Math.exp(-(t - c) / 12);
    const Z = new Float64Array(n * T).map((_, i) => 50 + 40 * Math.sin(i / 3) + rnd());
    for (const init of [null, new Float64Array(n * T).map(() => rnd())]) {
      const i1 = new Float64Array(n * T), a1 = new Float64Array(n * T), i2 = new Float64Array(n * T), a2 = new Float64Array(n * T);
      k!.solve(Z, St, init, i1, a1, n, T, clamp);
      stockDrivenSolveTS(Z, n, T, St, init, clamp, i2, a2);
      for (let i = 0; i < n * T; i++) {
        expect(Math.abs(i1[i]! - i2[i]!)).toBeLessThanOrEqual(1e-9 * Math.max(1, Math.abs(i2[i]!)));
        expect(Math.abs(a1[i]! - a2[i]!)).toBeLessThanOrEqual(1e-9 * Math.max(1, Math.abs(a2[i]!)));
        if (clamp) expect(i1[i]!).toBeGreaterThanOrEqual(0);
      }
    }
  });

  it("computes in place in the shared arena (views of a WebAssembly memory)", () => {
    const arena = KernelArena.shared();
    const n = 11, T = 37;
    const P = triangular(T, (c, t) => 1 / (2 + t - c));
    const I = arena.alloc(n * T), O = arena.alloc(n * T);
    I.set(new Float64Array(n * T).map((_, i) => 1 + (i % 13)));
    k!.product(I, arena.copyIn(P), O, n, T);
    const want = plainProduct(I, n, T, P);
    for (let i = 0; i < n * T; i++) expect(Math.abs(O[i]! - want[i]!)).toBeLessThanOrEqual(1e-13 * want[i]!);
  });

  it("refuses arrays shorter than n × T, naming what is wrong", () => {
    const T = 10;
    expect(() => k!.product(new Float64Array(5), new Float64Array(T * T), new Float64Array(2 * T), 2, T)).toThrow(/shorter than n × T/);
    expect(() => k!.product(new Int32Array(20) as unknown as Float64Array, new Float64Array(T * T), new Float64Array(20), 2, T)).toThrow(/Float64Array/);
  });

  it("the AVX2 code gives the same bits as the AVX-512 code (one fused chain per result, whatever the width)", () => {
    if (k!.info().isa !== "avx512") return; // on an AVX2-only CPU there is one code path
    const n = 13, T = 45;
    const script = `
      const { createRequire } = require("node:module");
      const k = createRequire(${JSON.stringify(path.join(ROOT, "package.json"))})(${JSON.stringify(path.join(ROOT, "build", "cairn_kernels.node"))});
      const n = ${n}, T = ${T};
      const I = new Float64Array(n * T).map((_, i) => 1 + ((i * 7919) % 101) / 7);
      const P = new Float64Array(T * T);
      for (let c = 0; c < T; c++) for (let t = c; t < T; t++) P[c * T + t] = Math.exp(-(t - c) / 6) / 6;
      const o = new Float64Array(n * T), s = new Float64Array(n * T), d = new Float64Array(n * T);
      k.inflow(I, P, o, s, d, null, null, n, T);
      const St = new Float64Array(T * T);
      for (let t = 0; t < T; t++) for (let c = 0; c <= t; c++) St[t * T + c] = P[c * T + t] + 1;
      const i2 = new Float64Array(n * T), a2 = new Float64Array(n * T);
      k.solve(s.map((x) => x + 1000), St, null, i2, a2, n, T, false);
      process.stdout.write(JSON.stringify({ isa: k.info().isa, o: Array.from(o), s: Array.from(s), i: Array.from(i2) }));`;
    const run = (isa?: string) => {
      const r = spawnSync(process.execPath, ["-e", script], { encoding: "utf8", env: { ...process.env, CAIRN_NATIVE_ISA: isa ?? "" } });
      expect(r.status, r.stderr).toBe(0);
      return JSON.parse(r.stdout) as { isa: string; o: number[]; s: number[]; i: number[] };
    };
    const wide = run(), narrow = run("avx2");
    expect(wide.isa).toBe("avx512");
    expect(narrow.isa).toBe("avx2");
    expect(narrow.o).toEqual(wide.o);
    expect(narrow.s).toEqual(wide.s);
    expect(narrow.i).toEqual(wide.i);
  });

  it("the models and the worker pool run them by default, with the results of the main thread", async () => {
    expect(kernelKind()).toBe("native");
    const T = 60, n = 50;
    const lt = makeLifetime({ distribution: "lognormal", mean: 15, sd: 6 }, "t");
    const g = new CohortGroup(T, Array(T).fill(curveOf(lt, T + 1)));
    const rnd = mulberry32(5);
    const I = new Float64Array(n * T).map(() => 1 + rnd() * 9);
    const pool = new CohortPool(2);
    try {
      const [a] = await runTasks([taskFor("inflow", g, I, n)], pool);
      const b = inflowDriven(g, I, n);
      expect(Array.from(a!.stock)).toEqual(Array.from(b.stock));
      const [c] = await runTasks([taskFor("stock", g, b.stock, n)], pool);
      const d = stockDriven(g, b.stock, n);
      expect(Array.from(c!.inflow)).toEqual(Array.from(d.inflow));
      setKernels("ts");
      const e = inflowDriven(g, I, n);
      for (let i = 0; i < n * T; i++) expect(Math.abs(e.stock[i]! - b.stock[i]!)).toBeLessThanOrEqual(1e-12 * Math.abs(e.stock[i]!));
    } finally {
      setKernels("native");
      await pool.close();
    }
  });
});
