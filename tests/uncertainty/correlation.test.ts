/**
 * Correlation across years of a per-series factor: AR(1) normal scores with lag-1 correlation ρ
 * (corr(z_t, z_(t+1)) = ρ for the stationary AR(1), Box & Jenkins, from memory), exact
 * marginals through the Gaussian copula, full and independent correlation.
 * Tolerances: 4 standard errors. The lag-1 sample autocorrelation of an AR(1) has variance
 * ≈ (1 − ρ²)/n over n pairs (Bartlett's formula, as given by Box & Jenkins; from memory); with
 * ρ = 0, 1/n.
 */
import { describe, expect, it } from "vitest";
import { Rng } from "../../src/uncertainty/random.js";
import { YearCorrelation, yearFactors } from "../../src/uncertainty/correlation.js";
import { factorMarginal, parseSpread } from "../../src/uncertainty/spreads.js";
import { normQuantile } from "../../src/uncertainty/normal.js";

const S = 4000;
const T = 25;

function lag1(z: Float64Array): { r: number; n: number } {
  let sx = 0;
  let sy = 0;
  let sxx = 0;
  let syy = 0;
  let sxy = 0;
  let n = 0;
  for (let s = 0; s < S; s++) {
    for (let t = 0; t + 1 < T; t++) {
      const x = z[s * T + t]!;
      const y = z[s * T + t + 1]!;
      sx += x;
      sy += y;
      sxx += x * x;
      syy += y * y;
      sxy += x * y;
      n++;
    }
  }
  const cov = sxy / n - (sx / n) * (sy / n);
  return { r: cov / Math.sqrt((sxx / n - (sx / n) ** 2) * (syy / n - (sy / n) ** 2)), n };
}

function momentsOfYear(x: Float64Array, t: number) {
  let s = 0;
  let s2 = 0;
  for (let i = 0; i < S; i++) s += x[i * T + t]!;
  const mean = s / S;
  for (let i = 0; i < S; i++) s2 += (x[i * T + t]! - mean) ** 2;
  return { mean, variance: s2 / (S - 1) };
}

describe("yearFactors", () => {
  const lognormal = factorMarginal(parseSpread({ family: "lognormal", rel_sd: 0.3 }));
  const triangular = factorMarginal(parseSpread({ family: "triangular", rel_half_width: 0.5 }));
  // normal scores back from the values: z = Φ⁻¹(F(x)) (exact inverse of the copula map)
  const scores = (x: Float64Array, cdf: (v: number) => number) => x.map((v) => normQuantile(cdf(v)));

  for (const rho of [0.9, 0.5, -0.4]) {
    it(`AR(1) with ρ = ${rho}: lag-1 correlation of the normal scores ≈ ρ, marginal exact`, () => {
      const x = yearFactors(lognormal, YearCorrelation.parse({ kind: "ar1", rho }), S, T, new Rng(17));
      const { r, n } = lag1(scores(x, lognormal.cdf));
      expect(Math.abs(r - rho)).toBeLessThan(4 * Math.sqrt((1 - rho * rho) / n));
      // every year's marginal: across independent series, mean 1 and variance 0.3²
      // (lognormal factor of mean 1, sd 0.3; NIST e-Handbook §1.3.6.6.9)
      for (const t of [0, 12, T - 1]) {
        const m = momentsOfYear(x, t);
        expect(Math.abs(m.mean - 1)).toBeLessThan(4 * Math.sqrt(0.09 / S));
        expect(Math.abs(m.variance - 0.09)).toBeLessThan(0.2 * 0.09);
      }
    });
  }

  it("full: the same value in every year of a series, different across series", () => {
    const x = yearFactors(triangular, { kind: "full" }, S, T, new Rng(5));
    let differ = 0;
    for (let s = 0; s < S; s++) for (let t = 1; t < T; t++) if (x[s * T + t] !== x[s * T]) differ++;
    expect(differ).toBe(0);
    expect(x[T]).not.toBe(x[0]);
    // triangular factor (0.5, 1, 1.5): mean 1, variance (0.25 + 1 + 2.25 − 0.5 − 0.75 − 1.5)/18 = 0.75/18
    const m = momentsOfYear(x, 3);
    expect(Math.abs(m.mean - 1)).toBeLessThan(4 * Math.sqrt(0.75 / 18 / S));
  });

  it("independent: lag-1 correlation ≈ 0; and AR(1) with ρ = 0 draws exactly the same", () => {
    const a = yearFactors(triangular, { kind: "independent" }, S, T, new Rng(8));
    const { r, n } = lag1(scores(a, triangular.cdf));
    expect(Math.abs(r)).toBeLessThan(4 / Math.sqrt(n));
    const b = yearFactors(triangular, { kind: "ar1", rho: 0 }, S, T, new Rng(8));
    expect(Buffer.from(b.buffer).equals(Buffer.from(a.buffer))).toBe(true);
  });

  it("is reproducible for a seed", () => {
    const c = YearCorrelation.parse({ kind: "ar1", rho: 0.7 });
    const a = yearFactors(lognormal, c, 10, 5, new Rng(1));
    expect(yearFactors(lognormal, c, 10, 5, new Rng(1))).toEqual(a);
    expect(yearFactors(lognormal, c, 10, 5, new Rng(2))).not.toEqual(a);
  });

  it("validates the correlation options", () => {
    expect(() => YearCorrelation.parse({ kind: "ar1", rho: 1 })).toThrow(/strictly between −1 and 1/);
    expect(() => YearCorrelation.parse({ kind: "ar1" })).toThrow(/rho must be a number/);
    expect(() => YearCorrelation.parse({ kind: "sometimes" })).toThrow();
  });
});
