import { describe, expect, it } from "vitest";
import { readFileSync } from "node:fs";
import path from "node:path";
import { cohortProductTS, stockDrivenSolveTS } from "../../src/cohort/kernels.js";
import { kernelCalls, newKernelMemory, packPanels, panelLength, wasmInflow, wasmProduct, wasmSolve } from "../../src/cohort/wasm/index.js";
import { KERNELS_PLAIN_WASM_BASE64, KERNELS_WASM_BASE64 } from "../../src/cohort/wasm/kernels-binary.js";
import { KernelArena } from "../../src/cohort/arena.js";
import { CohortGroup, curveOf, inflowDriven, initialContribution, makeLifetime, stockDriven } from "../../src/cohort/index.js";
import { runTasks, taskFor, CohortPool } from "../../src/cohort/pool.js";
import { mulberry32 } from "../../src/data/prng.js";
import { ROOT } from "../helpers.js";

function triangular(T: number, f: (c: number, t: number) => number): Float64Array {
  const M = new Float64Array(T * T);
  for (let c = 0; c < T; c++) for (let t = c; t < T; t++) M[c * T + t] = f(c, t);
  return M;
}

describe("WebAssembly SIMD kernels agree with the TypeScript kernels", () => {
  // 45 × 401 and 170 × 450: long horizons, where series go in chunks (kernels.wat, $chunk), the last one partial
  it.each([[1, 1], [3, 7], [5, 13], [8, 40], [37, 203], [45, 401], [170, 450]])("product, %i series × %i years (padding edges)", (n, T) => {
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

  it("the committed binaries are the assembly of kernels.wat (run npm run build:wasm after editing it)", async () => {
    const { assemble } = await import(path.join(ROOT, "scripts", "build-wasm.mjs"));
    const wat = path.join(ROOT, "src", "cohort", "wasm", "kernels.wat");
    expect((await assemble(wat, "relaxed")).toString("base64")).toBe(KERNELS_WASM_BASE64);
    expect((await assemble(wat, "plain")).toString("base64")).toBe(KERNELS_PLAIN_WASM_BASE64);
    expect(readFileSync(path.join(ROOT, "src", "cohort", "wasm", "kernels.wat"), "utf8")).toContain("f64x2");
  });
});

describe("kernels in place in the shared arena", () => {
  it.each([[4, 8], [7, 13], [13, 61], [40, 203], [150, 401]])("%i series × %i years: in place = staged = TypeScript (inflow-driven with an initial stock, solve with init)", (n, T) => {
    const arena = KernelArena.shared();
    const rnd = mulberry32(n * 7 + T);
    const P = triangular(T, (c, t) => Math.exp(-(t - c) / 7) / 7);
    const St = new Float64Array(T * T);
    for (let t = 0; t < T; t++) for (let c = 0; c <= t; c++) St[t * T + c] = Math.exp(-(t - c) / 9);
    const I = new Float64Array(n * T).map(() => rnd() * 100);
    const initOut = new Float64Array(n * T).map(() => rnd());
    const stock0 = new Float64Array(n).map(() => 500 * rnd());
    // staged: plain arrays
    const staged = wasmInflow(I, n, T, P, initOut, stock0);
    const expectOut = new Float64Array(n * T);
    cohortProductTS(I, n, T, P, expectOut);
    // in place: every array in the arena, the panels prepared there
    const mats = arena.groupMatrices(T, St, P, St);
    const Ia = arena.copyIn(I), io = arena.copyIn(initOut), s0 = arena.copyIn(stock0);
    const out = { outflow: arena.alloc(n * T), stock: arena.alloc(n * T), stockChange: arena.alloc(n * T) };
    const before = kernelCalls.inPlace;
    wasmInflow(Ia, n, T, mats.P, io, s0, out);
    expect(kernelCalls.inPlace).toBe(before + 1);
    for (let i = 0; i < n * T; i++) {
      expect(out.outflow[i]).toBe(staged.outflow[i]);
      expect(out.stock[i]).toBe(staged.stock[i]);
      expect(Math.abs(out.outflow[i]! - initOut[i]! - expectOut[i]!)).toBeLessThanOrEqual(1e-12 * Math.abs(expectOut[i]!) + 1e-12);
    }
    // solve, with an initial stock term, against the TypeScript solve
    const Z = arena.copyIn(out.stock);
    const ia = arena.alloc(n * T), aa = arena.alloc(n * T);
    wasmSolve(Z, n, T, mats.St!, io, false, ia, aa);
    expect(kernelCalls.inPlace).toBe(before + 2);
    const i2 = new Float64Array(n * T), a2 = new Float64Array(n * T);
    stockDrivenSolveTS(Z, n, T, St, initOut, false, i2, a2);
    for (let i = 0; i < n * T; i++) expect(Math.abs(ia[i]! - i2[i]!)).toBeLessThanOrEqual(1e-9 * Math.max(1, Math.abs(i2[i]!)));
    arena.unpin(P);
    for (const a of [Ia, io, s0, Z, ia, aa, ...Object.values(out)]) arena.release(a);
  });

  it("the plain-SIMD binary (no fused multiply-add) gives the TypeScript product too", () => {
    const mem = newKernelMemory(16);
    const k = new WebAssembly.Instance(new WebAssembly.Module(Buffer.from(KERNELS_PLAIN_WASM_BASE64, "base64")), { env: { mem } }).exports as unknown as { product(...a: number[]): void };
    const n = 8, T = 29;
    const rnd = mulberry32(3);
    const M = triangular(T, (c, t) => 1 / (1 + t - c));
    const f = new Float64Array(mem.buffer);
    const pl = panelLength(T);
    packPanels(f, M, T);
    const I = new Float64Array(n * T).map(() => rnd());
    f.set(I, pl);
    // the panels sit at double offset 0, the input at pl, the output after it
    k.product(pl * 8, 0, (pl + n * T) * 8, n, T);
    const want = new Float64Array(n * T);
    cohortProductTS(I, n, T, M, want);
    for (let i = 0; i < n * T; i++) expect(Math.abs(f[pl + n * T + i]! - want[i]!)).toBeLessThanOrEqual(1e-13 * want[i]!);
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

  it("a task that fails in a worker rejects with its message, and the pool goes on working", async () => {
    const T = 12, n = 8;
    const bad = CohortGroup.fromMatrices(T, new Float64Array(T * T), new Float64Array(T * T), null); // σ(0) = 0
    const lt = makeLifetime({ distribution: "normal", mean: 6, sd: 2 }, "t");
    const good = new CohortGroup(T, Array(T).fill(curveOf(lt, T + 1)));
    const I = new Float64Array(n * T).fill(1);
    const pool = new CohortPool(2);
    try {
      await expect(runTasks([taskFor("stock", bad, I, n)], pool)).rejects.toThrow("σ(0) = 0");
      const [a] = await runTasks([taskFor("inflow", good, I, n)], pool);
      expect(Array.from(a!.stock)).toEqual(Array.from(inflowDriven(good, I, n).stock));
    } finally {
      await pool.close();
    }
  });

  it("with an initial stock, indicators and clamp, and series counts that are not multiples of 4", async () => {
    const T = 45, n = 37;
    const lt = makeLifetime({ distribution: "weibull", shape: 2, scale: 14 }, "t");
    const cu = curveOf(lt, T + 60);
    const g = new CohortGroup(T, Array(T).fill(cu));
    const rnd = mulberry32(11);
    const I = new Float64Array(n * T).map(() => 1 + rnd() * 9);
    const init = initialContribution({ byAge: null, total: new Float64Array(n).map(() => 100 + 50 * rnd()), A: 40, curves: Array(40).fill(cu) }, n, T);
    const pool = new CohortPool(2);
    const budget = process.env.CAIRN_ARENA_BUDGET_MB;
    try {
      for (const small of [false, true]) {
        // small: a budget of 0.05 MiB makes the call run in waves of a few series each
        if (small) process.env.CAIRN_ARENA_BUDGET_MB = "0.05";
        const [a] = await runTasks([taskFor("inflow", g, I, n, { initial: init, indicators: true })], pool);
        const b = inflowDriven(g, I, n, { initial: init, indicators: true });
        for (const f of ["outflow", "stock", "stockChange", "meanAgeStock", "meanAgeOutflow"] as const) expect(Array.from(a![f]!), f).toEqual(Array.from(b[f]!));
        // a falling target makes negative inflow: clamped to 0
        const Z = new Float64Array(n * T).map((_, i) => 300 * Math.exp(-(i % T) / 8));
        const [c] = await runTasks([taskFor("stock", g, Z, n, { initial: init, clamp: true, indicators: true })], pool);
        const d = stockDriven(g, Z, n, { initial: init, clamp: true, indicators: true });
        for (const f of ["inflow", "outflow", "stock", "unmet", "meanAgeStock"] as const) expect(Array.from(c![f]!), f).toEqual(Array.from(d[f]!));
        expect(d.unmet!.some((x) => Math.abs(x) > 1e-9)).toBe(true);
        expect(c!.inflow.buffer instanceof SharedArrayBuffer).toBe(!small); // waves return ordinary arrays
      }
    } finally {
      if (budget === undefined) delete process.env.CAIRN_ARENA_BUDGET_MB;
      else process.env.CAIRN_ARENA_BUDGET_MB = budget;
      await pool.close();
    }
  });
});

describe("the cohort arena's allocator", () => {
  it("reuses freed blocks (best fit, split, merged), lowers its top, and frees only whole blocks", () => {
    const arena = KernelArena.shared();
    const top0 = arena.reservedBytes;
    const live0 = arena.liveBytes;
    // Requests of changing sizes, freed each round: the arena must not grow round after round.
    let top1 = 0;
    for (let round = 0; round < 20; round++) {
      const blocks = [1000, 37, 5000 + round * 100, 64, 2048].map((n) => arena.alloc(n));
      blocks.forEach((b, i) => b.fill(i + round));
      blocks.forEach((b, i) => expect(b.every((x) => x === i + round)).toBe(true)); // no overlap
      expect(arena.owns(blocks[0]!.subarray(0, 10))).toBe(false); // a part of a block is not a block
      arena.release(blocks[0]!.subarray(0, 10));
      expect(arena.owns(blocks[0]!)).toBe(true);
      for (const b of [blocks[1], blocks[3], blocks[0], blocks[4], blocks[2]]) arena.release(b!);
      if (round === 0) top1 = arena.reservedBytes;
      expect(arena.reservedBytes).toBeLessThanOrEqual(Math.max(top1, top0));
      expect(arena.liveBytes).toBe(live0);
    }
    // A freed block serves a smaller request (this one or a better fit): the arena does not grow.
    const a = arena.alloc(4096), b = arena.alloc(16);
    arena.release(a);
    const top = arena.reservedBytes;
    const c = arena.alloc(1000);
    expect(arena.reservedBytes).toBe(top);
    expect(c.byteOffset + c.byteLength).toBeLessThanOrEqual(top);
    arena.release(b);
    arena.release(c);
    expect(arena.liveBytes).toBe(live0);
  });
});

describe("the cohort arena's group matrices", () => {
  it("keeps the latest call's groups beyond the cache budget, and frees older calls' groups down to it", () => {
    const arena = KernelArena.shared();
    // 24 groups of 800 years: about 15 MB of matrices each, 370 MB in all, beyond the 256 MiB budget.
    const T = 800;
    const Ps = Array.from({ length: 24 }, (_, g) => triangular(T, (c, t) => (t - c === g % 7 ? 1 : 0)));
    const S = new Float64Array(T * T);
    arena.beginCall();
    const first = Ps.map((P) => arena.groupMatrices(T, S, P, null));
    for (const P of Ps) arena.unpin(P);
    const kept = arena.liveBytes;
    // The same groups in the next call: none is made again (the same arrays come back).
    arena.beginCall();
    Ps.forEach((P, g) => expect(arena.groupMatrices(T, S, P, null)).toBe(first[g]));
    for (const P of Ps) arena.unpin(P);
    expect(arena.liveBytes).toBe(kept);
    // A call that uses one of them: the others (an older call's) go, down to the budget.
    arena.beginCall();
    arena.groupMatrices(T, S, Ps[0]!, null);
    arena.unpin(Ps[0]!);
    expect(arena.liveBytes).toBeLessThan(kept - 100 * 2 ** 20);
    expect(arena.groupMatrices(T, S, Ps[0]!, null)).toBe(first[0]);
    arena.unpin(Ps[0]!);
  });
});

describe("lifetime curves carry no subnormal numbers into the kernels", () => {
  it.each([
    { distribution: "normal", mean: 20, sd: 6 }, { distribution: "lognormal", mean: 30, sd: 12 },
    { distribution: "weibull", shape: 3, scale: 20 }, { distribution: "gamma", mean: 15, sd: 5 },
  ])("%o over 800 years: shares below 1e-300 are 0", (spec) => {
    const c = curveOf(makeLifetime(spec as Parameters<typeof makeLifetime>[0], "t"), 800);
    for (const v of [...c.sigma, ...c.leave]) expect(v === 0 || Math.abs(v) >= 1e-300).toBe(true);
    // the light tails reach that far (the normal's passes through the subnormal range near age 245 for these parameters)
    if (spec.distribution === "normal" || spec.distribution === "weibull") expect(c.leave[799]).toBe(0);
  });
});
