/**
 * Every sampler of src/uncertainty draws only from the seeded generator: with Math.random and
 * jstat's own random source both replaced by functions that throw, every kind of draw still runs,
 * and jstat's source is the throwing one again afterwards.
 */
import { afterEach, beforeEach, describe, expect, it } from "vitest";
import pkg from "jstat";
import { Rng } from "../../src/uncertainty/random.js";
import { sampleInputs, sampleMarginal } from "../../src/uncertainty/designs.js";
import { yearFactors } from "../../src/uncertainty/correlation.js";
import { parseSpread, resolveSpread } from "../../src/uncertainty/spreads.js";
import { sobolDesign, sobolIndices } from "../../src/uncertainty/sensitivity.js";

const { jStat } = pkg;

describe("no draw reaches Math.random or jstat's default source", () => {
  const realRandom = Math.random;
  const realJstat = jStat._random_fn;
  const forbidden = () => {
    throw new Error("an unseeded random source was used");
  };
  beforeEach(() => {
    Math.random = forbidden;
    jStat.setRandom(forbidden);
  });
  afterEach(() => {
    Math.random = realRandom;
    jStat.setRandom(realJstat);
  });

  it("covers every family, both designs, every correlation and the Sobol' design with bootstrap", () => {
    const marginals = [
      resolveSpread(parseSpread({ family: "normal", rel_sd: 0.2 }), 10),
      resolveSpread(parseSpread({ family: "normal", sd: 2, truncate_below: 0 }), 1),
      resolveSpread(parseSpread({ family: "lognormal", rel_sd: 0.5 }), 3),
      resolveSpread(parseSpread({ family: "uniform", min: 0, max: 1 }), 0),
      resolveSpread(parseSpread({ family: "triangular", rel_half_width: 0.3 }), 5),
    ];
    const rng = new Rng(1);
    for (const m of marginals) expect(sampleMarginal(m, 2000, rng).every(Number.isFinite)).toBe(true);
    for (const design of ["random", "lhs"] as const) expect(sampleInputs(marginals, design, 500, rng).every(Number.isFinite)).toBe(true);
    for (const m of marginals) {
      for (const c of [{ kind: "full" }, { kind: "independent" }, { kind: "ar1", rho: 0.6 }] as const) {
        expect(yearFactors(m, c, 20, 10, rng).every(Number.isFinite)).toBe(true);
      }
    }
    const d = sobolDesign(marginals, 64, rng);
    const y = new Float64Array(d.runs).map((_, r) => d.rows[5 * r]! + d.rows[5 * r + 2]!);
    expect(sobolIndices(y, 64, 5, { bootstrap: { resamples: 50, seed: 3 } }).first.every(Number.isFinite)).toBe(true);
    expect(jStat._random_fn).toBe(forbidden);
    expect(() => Math.random()).toThrow(/unseeded/);
  });
});
