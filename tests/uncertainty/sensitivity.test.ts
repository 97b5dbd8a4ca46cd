/**
 * Sobol' indices (Saltelli et al. 2010 first order, Jansen total effect) on the Ishigami
 * function, whose indices are known in closed form (Ishigami & Homma 1990):
 *   f = sin x1 + a sin² x2 + b x3⁴ sin x1, xi ~ U(−π, π), a = 7, b = 0.1;
 *   V = a²/8 + bπ⁴/5 + b²π⁸/18 + 1/2, V1 = (1 + bπ⁴/5)²/2, V2 = a²/8, V3 = 0, V13 = 8b²π⁸/225;
 *   S1 = V1/V, S2 = V2/V, S3 = 0, ST1 = (V1 + V13)/V, ST2 = V2/V, ST3 = V13/V
 * (≈ 0.3139, 0.4424, 0, 0.5576, 0.4424, 0.2437).
 * Tolerance: 4 bootstrap standard errors of each estimate (N = 2^14 base rows, 500 resamples);
 * at this N the standard errors are about 0.003–0.012, so the check also fails any estimator
 * that is off by more than ~0.05. A 4-SE miss has probability below 1e-4 per index.
 */
import { describe, expect, it } from "vitest";
import { Rng } from "../../src/uncertainty/random.js";
import { normalMarginal, uniformMarginal } from "../../src/uncertainty/marginals.js";
import { sobolDesign, sobolIndices } from "../../src/uncertainty/sensitivity.js";

const a = 7;
const b = 0.1;
const pi4 = Math.PI ** 4;
const pi8 = Math.PI ** 8;
const V = (a * a) / 8 + (b * pi4) / 5 + (b * b * pi8) / 18 + 0.5;
const V1 = (1 + (b * pi4) / 5) ** 2 / 2;
const V2 = (a * a) / 8;
const V13 = (8 * b * b * pi8) / 225;
const S = [V1 / V, V2 / V, 0];
const ST = [(V1 + V13) / V, V2 / V, V13 / V];

const ishigami = (x1: number, x2: number, x3: number) => Math.sin(x1) + a * Math.sin(x2) ** 2 + b * x3 ** 4 * Math.sin(x1);

describe("Sobol' indices on the Ishigami function", () => {
  it("the closed-form values are the published ones", () => {
    // Commonly published values, 4 decimals (e.g. Saltelli et al., Global Sensitivity Analysis:
    // The Primer, 2008; from memory).
    [0.3139, 0.4424, 0].forEach((v, i) => expect(S[i]).toBeCloseTo(v, 4));
    [0.5576, 0.4424, 0.2437].forEach((v, i) => expect(ST[i]).toBeCloseTo(v, 4));
  });

  it("estimates S and ST within 4 bootstrap standard errors (two outputs per run)", () => {
    const N = 2 ** 14;
    const u = uniformMarginal(-Math.PI, Math.PI);
    const d = sobolDesign([u, u, u], N, new Rng(2010));
    expect(d.runs).toBe(N * 5);
    // Two outputs per run, run-major: the Ishigami function, and a linear model 3 + x1 + 2·x2
    // (additive: S = ST = (1, 4, 0)/5, as the variances of x1 and x2 are equal).
    const y = new Float64Array(d.runs * 2);
    for (let r = 0; r < d.runs; r++) {
      const [x1, x2, x3] = [d.rows[3 * r]!, d.rows[3 * r + 1]!, d.rows[3 * r + 2]!];
      y[2 * r] = ishigami(x1, x2, x3);
      y[2 * r + 1] = 3 + x1 + 2 * x2;
    }
    const res = sobolIndices(y, N, 3, { outputsPerRun: 2, bootstrap: { resamples: 500, seed: 1 } });
    const bs = res.bootstrap!;
    expect(bs.resamples).toBe(500);
    expect(res.runs).toBe(N * 5);
    const linear = [0.2, 0.8, 0];
    for (let i = 0; i < 3; i++) {
      expect(Math.abs(res.first[i]! - S[i]!)).toBeLessThan(4 * bs.firstSe[i]!);
      expect(Math.abs(res.total[i]! - ST[i]!)).toBeLessThan(4 * bs.totalSe[i]!);
      expect(bs.firstSe[i]).toBeLessThan(0.02);
      expect(bs.firstLow[i]).toBeLessThan(res.first[i]!);
      expect(bs.firstHigh[i]).toBeGreaterThan(res.first[i]!);
      expect(Math.abs(res.first[3 + i]! - linear[i]!)).toBeLessThan(4 * bs.firstSe[3 + i]! + 1e-12);
      expect(Math.abs(res.total[3 + i]! - linear[i]!)).toBeLessThan(4 * bs.totalSe[3 + i]! + 1e-12);
    }
    // V(Y): Ishigami closed form; linear: (1 + 4)·π²/3 (U(−π, π) variance (2π)²/12, NIST e-Handbook §1.3.6.6.2).
    expect(Math.abs(res.variance[0]! / V - 1)).toBeLessThan(0.03);
    expect(Math.abs(res.variance[1]! / ((5 * Math.PI ** 2) / 3) - 1)).toBeLessThan(0.03);
  });
});

describe("design and checks", () => {
  it("builds A, B and A_B^(i): A with column i from B", () => {
    const N = 4;
    const d = sobolDesign([normalMarginal(0, 1), normalMarginal(10, 1), normalMarginal(20, 1)], N, new Rng(3), "lhs");
    const row = (block: number, j: number) => [...d.rows.subarray((block * N + j) * 3, (block * N + j) * 3 + 3)];
    for (let j = 0; j < N; j++) {
      const A = row(0, j);
      const B = row(1, j);
      for (let i = 0; i < 3; i++) {
        const AB = row(2 + i, j);
        expect(AB).toEqual(A.map((x, c) => (c === i ? B[c] : x)));
      }
    }
  });

  it("is reproducible, bootstrap included", () => {
    const u = uniformMarginal(0, 1);
    const run = () => {
      const d = sobolDesign([u, u], 64, new Rng(4));
      const y = new Float64Array(d.runs).map((_, r) => d.rows[2 * r]! * d.rows[2 * r + 1]!);
      return sobolIndices(y, 64, 2, { bootstrap: { resamples: 20, seed: 9 } });
    };
    expect(run()).toEqual(run());
  });

  it("names a wrong output length and a bootstrap too large to store", () => {
    expect(() => sobolIndices(new Float64Array(10), 4, 2)).toThrow(/outputs hold 10 numbers; N·\(k \+ 2\)·M = 4·4·1 = 16 expected/);
    expect(() => sobolIndices(new Float64Array(16 * 1000), 4, 2, { outputsPerRun: 1000, bootstrap: { resamples: 100_000, seed: 1 } })).toThrow(
      /at most .* accepted/,
    );
  });

  it("gives NaN indices for an output without variance", () => {
    const res = sobolIndices(new Float64Array(4 * 3).fill(2), 4, 1);
    expect(res.first[0]).toBeNaN();
    expect(res.total[0]).toBeNaN();
  });
});
