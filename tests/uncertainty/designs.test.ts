/**
 * Sampling designs: the Latin hypercube property (McKay, Beckman & Conover 1979: one point in
 * each of the D equal-probability strata of every input), reproducibility, and the mapping
 * through each input's quantile.
 */
import { describe, expect, it } from "vitest";
import { Rng } from "../../src/uncertainty/random.js";
import { permutation, sampleInputs, uniformDesign } from "../../src/uncertainty/designs.js";
import { lognormalMarginal, normalMarginal, uniformMarginal } from "../../src/uncertainty/marginals.js";

const same = (a: Float64Array, b: Float64Array) => Buffer.from(a.buffer).equals(Buffer.from(b.buffer));

describe("Latin hypercube", () => {
  it("puts exactly one point in each stratum [i/D, (i + 1)/D) of every input", () => {
    for (const [D, K] of [[1, 1], [7, 3], [500, 5]] as const) {
      const u = uniformDesign("lhs", D, K, new Rng(D * 31 + K));
      for (let k = 0; k < K; k++) {
        const hit = new Uint8Array(D);
        for (let d = 0; d < D; d++) {
          const x = u[d * K + k]!;
          expect(x).toBeGreaterThan(0);
          expect(x).toBeLessThan(1);
          hit[Math.floor(x * D)]!++;
        }
        expect(hit.every((h) => h === 1)).toBe(true);
      }
    }
  });

  it("pairs the strata of different inputs at random (not the identity)", () => {
    const D = 200;
    const u = uniformDesign("lhs", D, 2, new Rng(3));
    let sameStratum = 0;
    for (let d = 0; d < D; d++) if (Math.floor(u[2 * d]! * D) === Math.floor(u[2 * d + 1]! * D)) sameStratum++;
    // Two independent random permutations share about one fixed point (Poisson(1)); 10 would be absurd.
    expect(sameStratum).toBeLessThan(10);
  });

  it("maps each input through its own quantile", () => {
    const ms = [normalMarginal(5, 2), lognormalMarginal(3, 1), uniformMarginal(-1, 1)];
    const u = uniformDesign("lhs", 50, 3, new Rng(11));
    const x = sampleInputs(ms, "lhs", 50, new Rng(11));
    for (let i = 0; i < x.length; i++) expect(x[i]).toBe(ms[i % 3]!.quantile(u[i]!));
  });

  it("is reproducible for a seed and changes with the seed", () => {
    const ms = [normalMarginal(0, 1), uniformMarginal(0, 1)];
    for (const design of ["random", "lhs"] as const) {
      const a = sampleInputs(ms, design, 100, new Rng(1));
      expect(same(a, sampleInputs(ms, design, 100, new Rng(1)))).toBe(true);
      expect(same(a, sampleInputs(ms, design, 100, new Rng(2)))).toBe(false);
    }
  });
});

describe("permutation", () => {
  it("is a permutation, and each value lands in each place about equally often", () => {
    const n = 5;
    const counts = new Int32Array(n * n);
    const rng = new Rng(9);
    const reps = 50_000;
    let notPermutation = 0;
    for (let r = 0; r < reps; r++) {
      const p = permutation(n, rng);
      let seen = 0;
      for (let i = 0; i < n; i++) {
        seen |= 1 << p[i]!;
        counts[i * n + p[i]!]!++;
      }
      if (seen !== 0b11111) notPermutation++;
    }
    expect(notPermutation).toBe(0);
    // Each count is Binomial(reps, 1/5): sd √(reps·0.2·0.8); tolerance 4 sd.
    const sd = Math.sqrt(reps * 0.2 * 0.8);
    for (const c of counts) expect(Math.abs(c - reps / n)).toBeLessThan(4 * sd);
  });
});

describe("input checks", () => {
  it("names bad sizes and designs", () => {
    expect(() => uniformDesign("lhs", 0, 2, new Rng(1))).toThrow(/draws must be a whole number ≥ 1 \(got 0\)/);
    expect(() => uniformDesign("sobol" as never, 3, 2, new Rng(1))).toThrow(/unknown sampling design "sobol"; accepted: random, lhs/);
  });
});
