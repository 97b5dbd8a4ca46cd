import { describe, expect, it } from "vitest";
import { readFileSync } from "node:fs";
import path from "node:path";
import { cohortProductTS, stockDrivenSolveTS } from "../../src/cohort/kernels.js";
import { wasmProduct, wasmSolve } from "../../src/cohort/wasm/index.js";
import { KERNELS_WASM_BASE64 } from "../../src/cohort/wasm/kernels-binary.js";
import { CohortGroup, curveOf, inflowDriven, makeLifetime, stockDriven } from "../../src/cohort/index.js";
import { runTasks, taskFor, CohortPool } from "../../src/cohort/pool.js";
import { mulberry32 } from "../../src/data/prng.js";
import { ROOT } from "../helpers.js";

function triangular(T: number, f: (c: number, t: number) => number): Float64Array {
  const M = new Float64Array(T * T);
  for (let c = 0; c < T; c++) for (let t = c; t < T; t++) M[c * T + t] = f(c, t);
  return M;
}

describe("WebAssembly SIMD kernels agree with the TypeScript kernels", () => {
  it.each([[1, 1], [3, 7], [5, 13], [8, 40], [37, 203]])("product, %i series × %i years (padding edges)", (n, T) => {
    const rnd = mulberry32(n * 1000 + T);
    const I = new Float64Array(n * T).map(() => rnd() * 100);
    const M = triangular(T, (c, t) => Math.exp(-(t - c) / 9) * (1 + c / T));
    const a = new Float64Array(n * T);
    const b = new Float64Array(n * T);
    wasmProduct(I, n, T, M, a);
    cohortProductTS(I, n, T, M, b);
    for (let i = 0; i < n * T; i++) expect(Math.abs(a[i]! - b[i]!)).toBeLessThanOrEqual(1e-13 * Math.abs(b[i]!) + 1e-300);
  });

  it.each([[1, 5], [6, 31], [9, 120]])("stock-driven solve, %i series × %i years, with and without clamp and initial stock", (n, T) => {
    const rnd = mulberry32(n + T);
    const St = new Float64Array(T * T);
    for (let t = 0; t < T; t++) for (let c = 0; c <= t; c++) St[t * T + c] = Math.exp(-(t - c) / 12);
    const Z = new Float64Array(n * T).map((_, i) => 50 + 40 * Math.sin(i / 3) + rnd());
    const init = new Float64Array(n * T).map(() => rnd());
    for (const clamp of [false, true]) for (const ini of [null, init]) {
      const i1 = new Float64Array(n * T), a1 = new Float64Array(n * T), i2 = new Float64Array(n * T), a2 = new Float64Array(n * T);
      wasmSolve(Z, n, T, St, ini, clamp, i1, a1);
      stockDrivenSolveTS(Z, n, T, St, ini, clamp, i2, a2);
      for (let i = 0; i < n * T; i++) {
        expect(Math.abs(i1[i]! - i2[i]!)).toBeLessThanOrEqual(1e-9 * Math.max(1, Math.abs(i2[i]!)));
        expect(Math.abs(a1[i]! - a2[i]!)).toBeLessThanOrEqual(1e-9 * Math.max(1, Math.abs(a2[i]!)));
      }
    }
  });

  it("the committed binary is the assembly of kernels.wat (run npm run build:wasm after editing it)", async () => {
    const { assemble } = await import(path.join(ROOT, "scripts", "build-wasm.mjs"));
    const bin: Buffer = await assemble(path.join(ROOT, "src", "cohort", "wasm", "kernels.wat"));
    expect(bin.toString("base64")).toBe(KERNELS_WASM_BASE64);
    expect(readFileSync(path.join(ROOT, "src", "cohort", "wasm", "kernels.wat"), "utf8")).toContain("f64x2");
  });
});

describe("worker pool gives the same results as the main thread", () => {
  it("inflow-driven, stock-driven, composition", async () => {
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
      const content = new Float64Array(n * 2 * T).fill(0.5);
      const [e] = await runTasks([taskFor("composition", g, I, n, { content, M: 2 })], pool);
      // Rows s·M + m (M = 2), each half the content: the two materials add up to the product stock.
      for (let s = 0; s < n; s++) for (let t = 0; t < T; t++) {
        expect(e!.stock[(2 * s) * T + t]! + e!.stock[(2 * s + 1) * T + t]!).toBeCloseTo(b.stock[s * T + t]!, 9);
      }
    } finally {
      await pool.close();
    }
  });
});
