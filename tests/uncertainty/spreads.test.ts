/**
 * Spreads: option validation, resolution for a central value, the multiplicative factor, and
 * the sample moments of every family against their closed forms.
 *
 * Tolerances: 4 standard errors. For a mean, SE = σ/√n; for a variance, SE ≈ √((μ4 − σ⁴)/n)
 * with μ4 the sample fourth central moment (large-sample variance of s², common practice, no
 * source). A 4-SE miss has probability below 1e-4 per check; the seeds are fixed.
 */
import { describe, expect, it } from "vitest";
import { z } from "zod";
import lognormalCdf from "@stdlib/stats-base-dists-lognormal-cdf";
import { Rng } from "../../src/uncertainty/random.js";
import { sampleInputs, sampleMarginal } from "../../src/uncertainty/designs.js";
import { factorMarginal, parseSpread, resolveSpread, Spread, spreadForm } from "../../src/uncertainty/spreads.js";
import type { Marginal } from "../../src/uncertainty/marginals.js";

function moments(x: Float64Array) {
  const n = x.length;
  let s = 0;
  for (const v of x) s += v;
  const mean = s / n;
  let m2 = 0;
  let m4 = 0;
  for (const v of x) {
    const d = (v - mean) ** 2;
    m2 += d;
    m4 += d * d;
  }
  return { n, mean, variance: m2 / (n - 1), m4: m4 / n };
}

function expectMoments(x: Float64Array, mean: number, variance: number) {
  const m = moments(x);
  expect(Math.abs(m.mean - mean)).toBeLessThan(4 * Math.sqrt(variance / m.n));
  expect(Math.abs(m.variance - variance)).toBeLessThan(4 * Math.sqrt((m.m4 - m.variance ** 2) / m.n));
}

/** Exact for piecewise polynomials of degree ≤ 3 on each piece (Simpson's rule). */
function simpsonPiece(g: (x: number) => number, a: number, b: number) {
  return ((b - a) / 6) * (g(a) + 4 * g((a + b) / 2) + g(b));
}

const N = 200_000;

describe("spread sample moments against closed forms", () => {
  const draw = (m: Marginal, seed: number) => sampleMarginal(m, N, new Rng(seed));
  const lhs = (m: Marginal, seed: number) => sampleInputs([m], "lhs", N, new Rng(seed));

  it("normal, relative and absolute: mean c, variance (rel_sd·c)² or sd² (NIST e-Handbook §1.3.6.6.1)", () => {
    const rel = resolveSpread(parseSpread({ family: "normal", rel_sd: 0.2 }), 50);
    expect(rel.mean).toBe(50);
    expect(rel.variance).toBeCloseTo(100, 10);
    expectMoments(draw(rel, 1), 50, 100);
    expectMoments(lhs(rel, 2), 50, 100);
    const abs = resolveSpread(parseSpread({ family: "normal", sd: 3 }), -4);
    expectMoments(draw(abs, 3), -4, 9);
  });

  it("truncated normal: the closed form of normal.ts (checked there by quadrature)", () => {
    const m = resolveSpread(parseSpread({ family: "normal", rel_sd: 0.8, truncate_below: 0 }), 10);
    // α = (0 − 10)/8 = −1.25, λ = φ(α)/Q(α): mean 10 + 8λ > 10, variance 64(1 + αλ − λ²) < 64.
    expect(m.family).toBe("truncated-normal");
    expect(m.mean).toBeGreaterThan(10);
    expect(m.variance).toBeLessThan(64);
    const x = draw(m, 4);
    expect(x.reduce((a, b) => Math.min(a, b), Infinity)).toBeGreaterThanOrEqual(0);
    expectMoments(x, m.mean, m.variance);
    expectMoments(lhs(m, 5), m.mean, m.variance);
  });

  it("lognormal from the mean and sd of the quantity (NIST e-Handbook §1.3.6.6.9)", () => {
    // With log-mean μ and log-sd σ: mean e^(μ + σ²/2), variance (e^(σ²) − 1)e^(2μ + σ²).
    // Mean 20, sd 10 → σ² = ln(1 + 0.25), μ = ln 20 − σ²/2.
    const s2 = Math.log(1.25);
    const mu = Math.log(20) - s2 / 2;
    const mean = Math.exp(mu + s2 / 2);
    const variance = (Math.exp(s2) - 1) * Math.exp(2 * mu + s2);
    for (const spread of [{ family: "lognormal", rel_sd: 0.5 }, { family: "lognormal", sd: 10 }]) {
      const m = resolveSpread(parseSpread(spread), 20);
      expect(m.mean).toBeCloseTo(mean, 12);
      expect(m.variance).toBeCloseTo(variance, 10);
      expectMoments(draw(m, 6), mean, variance);
      expectMoments(lhs(m, 7), mean, variance);
      // Its CDF against the @stdlib lognormal CDF (reference library).
      for (const x of [5, 15, 20, 40]) expect(m.cdf(x)).toBeCloseTo(lognormalCdf(x, mu, Math.sqrt(s2)), 14);
    }
  });

  it("uniform: mean (a + b)/2, variance (b − a)²/12 (NIST e-Handbook §1.3.6.6.2)", () => {
    const cases: [object, number, number, number][] = [
      [{ family: "uniform", rel_half_width: 0.3 }, 10, 7, 13],
      [{ family: "uniform", half_width: 2 }, 10, 8, 12],
      [{ family: "uniform", min: -1, max: 5 }, 10, -1, 5],
    ];
    cases.forEach(([spread, c, a, b], i) => {
      const m = resolveSpread(parseSpread(spread), c);
      expect(m.mean).toBeCloseTo((a + b) / 2, 12);
      expect(m.variance).toBeCloseTo((b - a) ** 2 / 12, 12);
      expectMoments(draw(m, 10 + i), (a + b) / 2, (b - a) ** 2 / 12);
      expectMoments(lhs(m, 20 + i), (a + b) / 2, (b - a) ** 2 / 12);
    });
  });

  it("triangular: mean (a + b + c)/3, variance (a² + b² + c² − ab − ac − bc)/18, checked by exact quadrature", () => {
    const cases: [object, number, number, number, number][] = [
      [{ family: "triangular", rel_half_width: 0.5 }, 8, 4, 8, 12],
      [{ family: "triangular", half_width: 1 }, 0, -1, 0, 1],
      [{ family: "triangular", min: 0, mode: 1, max: 6 }, 3, 0, 1, 6],
    ];
    cases.forEach(([spread, central, a, c, b], i) => {
      // Closed forms: Johnson, Kotz & Balakrishnan, Continuous Univariate Distributions vol. 2,
      // ch. 26 (from memory); verified here by Simpson's rule, exact for x·f and x²·f, which are
      // polynomials of degree ≤ 3 on [a, c] and on [c, b].
      const mean = (a + b + c) / 3;
      const variance = (a * a + b * b + c * c - a * b - a * c - b * c) / 18;
      const pdf = (x: number) => (x <= c ? (2 * (x - a)) / ((b - a) * (c - a) || 1) : (2 * (b - x)) / ((b - a) * (b - c) || 1));
      const moment = (k: number) => (c > a ? simpsonPiece((x) => x ** k * pdf(x), a, c) : 0) + (b > c ? simpsonPiece((x) => x ** k * pdf(x), c, b) : 0);
      expect(moment(0)).toBeCloseTo(1, 12);
      expect(moment(1)).toBeCloseTo(mean, 12);
      expect(moment(2) - mean ** 2).toBeCloseTo(variance, 12);
      const m = resolveSpread(parseSpread(spread), central);
      expect(m.mean).toBeCloseTo(mean, 12);
      expect(m.variance).toBeCloseTo(variance, 12);
      expectMoments(draw(m, 30 + i), mean, variance);
      expectMoments(lhs(m, 40 + i), mean, variance);
    });
  });
});

describe("spread forms and the multiplicative factor", () => {
  it("tells the form from the parameters", () => {
    expect(spreadForm(parseSpread({ family: "normal", rel_sd: 0.1 }))).toBe("multiplicative");
    expect(spreadForm(parseSpread({ family: "lognormal", sd: 1 }))).toBe("absolute");
    expect(spreadForm(parseSpread({ family: "uniform", half_width: 1 }))).toBe("absolute");
    expect(spreadForm(parseSpread({ family: "triangular", min: 0, mode: 1, max: 2 }))).toBe("fixed");
  });

  it("scales: the quantity's quantiles are central × the factor's, for c > 0", () => {
    const spreads = [
      { family: "normal", rel_sd: 0.3 },
      { family: "normal", rel_sd: 0.6, truncate_below: 0 },
      { family: "lognormal", rel_sd: 0.4 },
      { family: "uniform", rel_half_width: 0.2 },
      { family: "triangular", rel_half_width: 1 },
    ];
    for (const s of spreads) {
      const spread = parseSpread(s);
      const f = factorMarginal(spread);
      if (s.family !== "normal" || !("truncate_below" in s)) expect(f.mean).toBeCloseTo(1, 14);
      for (const c of [0.5, 7, 1234]) {
        const x = resolveSpread(spread, c);
        for (const p of [0.01, 0.3, 0.5, 0.9]) expect(x.quantile(p) / (c * f.quantile(p))).toBeCloseTo(1, 12);
      }
    }
  });

  it("keeps a zero central value at zero for relative spreads", () => {
    const m = resolveSpread(parseSpread({ family: "lognormal", rel_sd: 0.4 }), 0);
    expect(m.family).toBe("point");
    expect(sampleMarginal(m, 3, new Rng(1))).toEqual(new Float64Array(3));
  });

  it("refuses a factor for absolute spreads and for truncation away from 0", () => {
    expect(() => factorMarginal(parseSpread({ family: "normal", sd: 1 }))).toThrow(/multiplicative spread.*got a absolute normal/);
    expect(() => factorMarginal(parseSpread({ family: "normal", rel_sd: 0.1, truncate_below: 2 }))).toThrow(/only at 0.*truncate_below = 2/);
  });
});

describe("spread validation", () => {
  const msg = (input: unknown) => {
    try {
      parseSpread(input, "uncertainty.inflow");
    } catch (e) {
      return (e as Error).message;
    }
    return "";
  };

  it("names the option, the value and what is accepted", () => {
    expect(msg({ family: "normal" })).toMatch(/uncertainty\.inflow: a normal spread takes rel_sd, or sd; got none of them/);
    expect(msg({ family: "normal", rel_sd: 0.1, sd: 2 })).toMatch(/takes rel_sd, or sd; got rel_sd = 0\.1, sd = 2/);
    expect(msg({ family: "normal", sd: -1 })).toMatch(/uncertainty\.inflow\.sd: sd must be ≥ 0; got -1/);
    expect(msg({ sd: 1 })).toMatch(/uncertainty\.inflow: a spread needs a family; accepted: normal, lognormal, uniform, triangular; got \{"sd":1\}/);
    expect(msg({ family: "gamma", sd: 1 })).toMatch(/unknown spread family "gamma"; accepted: normal, lognormal, uniform, triangular/);
    expect(msg({ family: "uniform", half_width: 1, width: 2 })).toMatch(/unknown option\(s\) width for a uniform spread; accepted: family, rel_half_width, half_width, min, max/);
    expect(msg({ family: "uniform", min: 3, max: 1 })).toMatch(/min must be below max; got min = 3, max = 1/);
    expect(msg({ family: "uniform", min: 3 })).toMatch(/takes rel_half_width, or half_width, or min and max; got min = 3/);
    expect(msg({ family: "triangular", min: 0, mode: 5, max: 2 })).toMatch(/mode must lie between min and max; got min = 0, mode = 5, max = 2/);
    expect(msg({ family: "uniform", rel_half_width: 1.5 })).toMatch(/rel_half_width must be between 0 and 1.*got 1\.5/);
    expect(msg({ family: "lognormal", rel_sd: "x" })).toMatch(/rel_sd must be a number; got "x"/);
  });

  it("refuses central values a spread cannot take, with the value", () => {
    expect(() => resolveSpread(parseSpread({ family: "lognormal", sd: 1 }), -2, "series S1")).toThrow(/series S1: a lognormal spread needs a positive central value \(got -2\)/);
    expect(() => resolveSpread(parseSpread({ family: "normal", sd: 1 }), NaN)).toThrow(/finite number \(got NaN\)/);
    expect(() => resolveSpread(parseSpread({ family: "normal", sd: 0.001, truncate_below: 10 }), 0)).toThrow(/standard deviations above the centre/);
  });

  it("generates a JSON Schema with one branch per family", () => {
    const js = z.toJSONSchema(Spread, { io: "input" }) as { oneOf?: { properties: { family: { const: string } } }[] };
    expect(js.oneOf?.map((b) => b.properties.family.const)).toEqual(["normal", "lognormal", "uniform", "triangular"]);
  });
});
