/**
 * The Monte Carlo engine (src/uncertainty/mc*.ts) against closed forms.
 *
 * The cohort model is linear in its input: with a multiplicative input error F of mean 1 and
 * sd s, the stock is S(t) = Σ_c I(c)·σ(t − c)·F(c) (inflow-driven, midpoint convention), so
 *   fully correlated errors (one F per series):  E[S] = S₀(t), sd[S] = s·S₀(t);
 *   independent errors (one F per year):         E[S] = S₀(t), sd[S] = s·√(Σ_c (I(c)·σ(t − c))²)
 * (linearity of expectation and variance of a sum of independent terms; NIST/SEMATECH
 * e-Handbook §1.3.5 / any probability text). Sample statistics are checked within 4 standard
 * errors: SE(mean) = sd/√D, SE(sd) ≈ sd/√(2(D − 1)) (normal sample, common practice, no source).
 */
import { describe, expect, it } from "vitest";
import { CohortGroup, curveOf, inflowDriven, makeLifetime } from "../../src/cohort/index.js";
import { computeChunk } from "../../src/uncertainty/mc-chunk.js";
import { runMonteCarlo } from "../../src/uncertainty/mc.js";
import type { McJob } from "../../src/uncertainty/mc-types.js";

const T = 30;
const D = 2000;

function job(over: Partial<McJob> = {}): McJob {
  const n = 3;
  const values = new Float64Array(n * T);
  for (let s = 0; s < n; s++) for (let t = 0; t < T; t++) values[s * T + t] = 100 * (s + 1) + 5 * t;
  const idx = new Int32Array(D * 3);
  for (let d = 0; d < D; d++) idx.fill(d, 3 * d, 3 * d + 3);
  return {
    step: "t", mode: "inflow-driven", clamp: false, n, T, A: 0, curveLength: T + 1, runs: D, idx,
    rows: [{ distribution: "normal", mean: 12, sd: 4, label: "1" }], tables: {}, ltValues: null, ltDraws: D,
    groups: [{ sids: Int32Array.from([0, 1, 2]), cohortRow: new Int32Array(T), initRow: null, initFixed: null }],
    values, initAmounts: null, M: 0, content: null, initContent: null, ctFactors: null, ctDraws: D, input: null,
    probabilities: [0.05, 0.5, 0.95], variables: ["inflow", "outflow", "stock"], totals: { index: new Int32Array(n), levels: 1, cells: 1 }, sobol: null, ...over,
  };
}

function central(j: McJob): Float64Array {
  const cu = curveOf(makeLifetime(j.rows[0]!, "x"), T + 1);
  return inflowDriven(new CohortGroup(T, Array(T).fill(cu)), j.values, j.n).stock;
}

describe("Monte Carlo engine", () => {
  it("zero spread: every quantile equals the deterministic run, on both paths", () => {
    const j = job({ input: { spread: { family: "normal", rel_sd: 0 }, correlation: { kind: "full" }, seed: 1 } });
    const S0 = central(j);
    for (const jj of [j, { ...j, input: { ...j.input!, correlation: { kind: "independent" as const } } }]) {
      const r = computeChunk(jj, { group: 0, j0: 0, j1: 3 });
      const st = r.stats[2]!;
      for (let i = 0; i < 3 * T; i++) {
        for (const q of st.quantiles) expect(q[i]).toBeCloseTo(S0[i]!, 8);
        expect(Math.abs(st.sd[i]!)).toBeLessThan(1e-9 * S0[i]!);
      }
    }
  });

  it("multiplicative input error, fully correlated: stock mean and sd equal the closed form", () => {
    const s = 0.1;
    const j = job({ input: { spread: { family: "normal", rel_sd: s }, correlation: { kind: "full" }, seed: 7 } });
    const S0 = central(j);
    const st = computeChunk(j, { group: 0, j0: 0, j1: 3 }).stats[2]!;
    for (const i of [5, T - 1, T + 10, 3 * T - 1]) {
      const sd = s * S0[i]!;
      expect(Math.abs(st.mean[i]! - S0[i]!)).toBeLessThan(4 * sd / Math.sqrt(D));
      expect(Math.abs(st.sd[i]! - sd)).toBeLessThan(4 * sd / Math.sqrt(2 * (D - 1)));
    }
  });

  it("multiplicative input error, independent across years: sd = s·√Σ(I·σ)²", () => {
    const s = 0.2;
    const j = job({ input: { spread: { family: "normal", rel_sd: s }, correlation: { kind: "independent" }, seed: 3 } });
    const cu = curveOf(makeLifetime(j.rows[0]!, "x"), T + 1);
    const S0 = central(j);
    const st = computeChunk(j, { group: 0, j0: 0, j1: 3 }).stats[2]!;
    for (const [sid, t] of [[0, 4], [1, 15], [2, T - 1]] as const) {
      let v = 0;
      for (let c = 0; c <= t; c++) v += (j.values[sid * T + c]! * cu.sigma[t - c]!) ** 2;
      const sd = s * Math.sqrt(v);
      const i = sid * T + t;
      expect(Math.abs(st.mean[i]! - S0[i]!)).toBeLessThan(4 * sd / Math.sqrt(D));
      expect(Math.abs(st.sd[i]! - sd)).toBeLessThan(4 * sd / Math.sqrt(2 * (D - 1)));
    }
  });

  it("the series path and the run path agree on drawn lifetimes (to rounding)", () => {
    // Two identical lifetimes rows with the same drawn means: one row per cohort takes the series path,
    // alternating rows force the run path; the runs are the same models.
    const lt = new Float64Array(2 * 4 * D).fill(NaN);
    for (let d = 0; d < D; d++) {
      const m = 12 * (0.8 + 0.4 * ((d * 0.618) % 1));
      lt[(0 * 4 + 0) * D + d] = m;
      lt[(1 * 4 + 0) * D + d] = m;
    }
    const rows = [{ distribution: "normal", mean: 12, sd: 4, label: "1" }, { distribution: "normal", mean: 12, sd: 4, label: "2" }];
    const a = computeChunk(job({ rows, ltValues: lt }), { group: 0, j0: 0, j1: 3 });
    const alt = Int32Array.from({ length: T }, (_, t) => t % 2);
    const jb = job({ rows, ltValues: lt });
    jb.groups[0]!.cohortRow = alt;
    const b = computeChunk(jb, { group: 0, j0: 0, j1: 3 });
    for (const v of [0, 1, 2]) for (let i = 0; i < 3 * T; i++) {
      expect(b.stats[v]!.mean[i]).toBeCloseTo(a.stats[v]!.mean[i]!, 6);
      expect(b.stats[v]!.quantiles[1]![i]).toBeCloseTo(a.stats[v]!.quantiles[1]![i]!, 6);
    }
    // Totals: per-run sums; their mean is the sum of the series' means (linearity of expectation).
    for (let t = 0; t < T; t++) {
      let sum = 0;
      for (let r = 0; r < D; r++) sum += a.totals![2 * D * T + r * T + t]!;
      const meanSeries = a.stats[2]!.mean[t]! + a.stats[2]!.mean[T + t]! + a.stats[2]!.mean[2 * T + t]!;
      expect(sum / D).toBeCloseTo(meanSeries, 6);
    }
  });

  it("the same bytes on one thread and on two", async () => {
    const rows = [{ distribution: "normal", mean: 12, sd: 4, label: "1" }];
    const lt = new Float64Array(4 * D).fill(NaN);
    for (let d = 0; d < D; d++) lt[d] = 12 * (0.9 + 0.2 * ((d * 0.37) % 1));
    const base = job({ rows, ltValues: lt, input: { spread: { family: "normal", rel_sd: 0.05 }, correlation: { kind: "ar1", rho: 0.5 }, seed: 9 } });
    // More series in several groups, so that the job is split into chunks and run on worker threads.
    const n = 40;
    const values = new Float64Array(n * T).map((_, i) => 50 + (i % 17));
    const big = { ...base, n, values, groups: [0, 1, 2, 3].map((g) => ({ sids: Int32Array.from({ length: 10 }, (_, i) => g * 10 + i), cohortRow: new Int32Array(T), initRow: null, initFixed: null })), totals: { index: new Int32Array(n), levels: 1, cells: 1 } };
    const one = await runMonteCarlo(big, { threads: 1 });
    const two = await runMonteCarlo(big, { threads: 2, inThreadBelow: 0 });
    expect(two.threads).toBe(2);
    expect(Buffer.from(two.stats[2]!.quantiles[0]!.buffer).equals(Buffer.from(one.stats[2]!.quantiles[0]!.buffer))).toBe(true);
    expect(Buffer.from(two.totalStats!.mean.buffer).equals(Buffer.from(one.totalStats!.mean.buffer))).toBe(true);
  });
});
