/**
 * Standard normal quantile (AS 241) and the lower-truncated normal, against the @stdlib
 * reference library and numerical integration.
 */
import { describe, expect, it } from "vitest";
import normalCdf from "@stdlib/stats-base-dists-normal-cdf";
import { normCdfFast, normQuantile, truncatedNormal } from "../../src/uncertainty/normal.js";
import { truncatedNormalMarginal } from "../../src/uncertainty/marginals.js";

const rel = (a: number, b: number) => Math.abs(a - b) / Math.abs(b);

describe("normQuantile (Wichura AS 241)", () => {
  it("inverts the @stdlib normal CDF to near machine precision, deep into the lower tail", () => {
    // Source: @stdlib/stats-base-dists-normal-cdf (reference library). The error of z = Φ⁻¹(p)
    // is read back through the CDF: dz = (Φ(z) − p)/φ(z); it must be a few ulps of z.
    for (const p of [1e-300, 1e-100, 1e-20, 1e-10, 1e-6, 0.001, 0.01, 0.05, 0.075, 0.1, 0.25, 0.4]) {
      const z = normQuantile(p);
      const dz = (normalCdf(z, 0, 1) - p) / (Math.exp(-0.5 * z * z) / Math.sqrt(2 * Math.PI));
      expect(Math.abs(dz / z)).toBeLessThan(2e-15);
    }
    expect(normQuantile(0.5)).toBe(0);
  });

  it("is odd about 1/2 and matches tabulated percentage points", () => {
    for (const p of [0.6, 0.9, 0.975, 0.999]) expect(normQuantile(p)).toBeCloseTo(-normQuantile(1 - p), 14);
    // Abramowitz & Stegun Table 26.5 (from memory): Φ⁻¹(0.975) = 1.959963985, Φ⁻¹(0.995) = 2.575829304.
    expect(normQuantile(0.975)).toBeCloseTo(1.959963985, 9);
    expect(normQuantile(0.995)).toBeCloseTo(2.575829304, 9);
  });

  it("returns ∓∞ at 0 and 1 and NaN outside [0, 1]", () => {
    expect(normQuantile(0)).toBe(-Infinity);
    expect(normQuantile(1)).toBe(Infinity);
    expect(normQuantile(-0.1)).toBeNaN();
    expect(normQuantile(NaN)).toBeNaN();
  });
});

/** ∫ g(x) dx on [a, b] by composite Simpson with n (even) intervals. */
function simpson(g: (x: number) => number, a: number, b: number, n = 20000): number {
  const h = (b - a) / n;
  let s = g(a) + g(b);
  for (let i = 1; i < n; i++) s += (i % 2 ? 4 : 2) * g(a + i * h);
  return (s * h) / 3;
}

describe("lower-truncated normal", () => {
  const cases: [number, number, number][] = [
    [1, 0.3, 0], // truncation 3.3 sd below: almost nothing cut
    [1, 1, 0], // α = −1
    [1, 0.5, 1.5], // α = 1: cut above the centre
    [0, 1, 5], // far tail
  ];
  for (const [mu, sigma, lower] of cases) {
    it(`has the closed-form mean and variance (μ = ${mu}, σ = ${sigma}, cut at ${lower}), checked by quadrature`, () => {
      const t = truncatedNormal(mu, sigma, lower);
      // Density φ((x − μ)/σ)/(σ·Q(α)) on [lower, ∞), Q from @stdlib (Q(α) = Φ(−α) by symmetry).
      const kept = normalCdf(-(lower - mu) / sigma, 0, 1);
      const pdf = (x: number) => Math.exp(-0.5 * ((x - mu) / sigma) ** 2) / (sigma * Math.sqrt(2 * Math.PI) * kept);
      const top = Math.max(lower, mu) + 40 * sigma;
      const mean = simpson((x) => x * pdf(x), lower, top);
      const variance = simpson((x) => (x - mean) ** 2 * pdf(x), lower, top);
      expect(rel(t.mean, mean)).toBeLessThan(1e-9);
      expect(rel(t.variance, variance)).toBeLessThan(1e-8);
    });
  }

  it("has a quantile that inverts its CDF, defined through @stdlib's normal CDF", () => {
    for (const [mu, sigma, lower] of cases) {
      const m = truncatedNormalMarginal(mu, sigma, lower);
      const alpha = (lower - mu) / sigma;
      // F(x) = (Φ(z) − Φ(α))/(1 − Φ(α)), computed as (Q(α) − Q(z))/Q(α) with Q(z) = Φ(−z) from @stdlib.
      const F = (x: number) => (normalCdf(-alpha, 0, 1) - normalCdf(-(x - mu) / sigma, 0, 1)) / normalCdf(-alpha, 0, 1);
      for (const p of [1e-6, 0.01, 0.3, 0.5, 0.9, 0.999]) {
        const x = m.quantile(p);
        expect(x).toBeGreaterThanOrEqual(lower);
        expect(Math.abs(F(x) - p)).toBeLessThan(1e-12);
        expect(Math.abs(m.cdf(x) - p)).toBeLessThan(1e-12);
      }
    }
  });

  it("refuses a truncation that leaves nothing of the normal", () => {
    expect(() => truncatedNormal(0, 1, 40)).toThrow(/40 .*standard deviations above the centre 0.*accepted/);
  });
});

describe("normCdfFast (Cody 1969)", () => {
  it("agrees with the @stdlib normal CDF within (1 + z²)·4e-16 relative (the rounding of z/√2, amplified by the tail)", () => {
    // Source: @stdlib/stats-base-dists-normal-cdf (reference library); the upper side is compared
    // in absolute terms (Φ near 1).
    for (let z = -8; z <= 0; z += 0.0625) expect(rel(normCdfFast(z), normalCdf(z, 0, 1))).toBeLessThan((1 + z * z) * 4e-16);
    for (let z = 0; z <= 8; z += 0.0625) expect(Math.abs(normCdfFast(z) - normalCdf(z, 0, 1))).toBeLessThan(2.3e-16);
    for (const z of [-12, -20, -30, -37]) expect(rel(normCdfFast(z), normalCdf(z, 0, 1))).toBeLessThan((1 + z * z) * 4e-16);
    expect(normCdfFast(-40)).toBe(0);
    expect(normCdfFast(40)).toBe(1);
  });
});
