/**
 * Lifetime distributions against sources outside the project. Each check names its source.
 */
import { describe, expect, it } from "vitest";
import weibullCdf from "@stdlib/stats-base-dists-weibull-cdf";
import gammaCdf from "@stdlib/stats-base-dists-gamma-cdf";
import lognormalCdf from "@stdlib/stats-base-dists-lognormal-cdf";
import normalCdf from "@stdlib/stats-base-dists-normal-cdf";
import logisticCdf from "@stdlib/stats-base-dists-logistic-cdf";
import { makeLifetime, normCdf, gamma, leavingVector, survivalVector, type Lifetime } from "../../src/cohort/index.js";

const rel = (a: number, b: number) => Math.abs(a - b) / Math.max(Math.abs(b), 1e-300);

describe("normal CDF — Abramowitz & Stegun (1964), Table 26.1", () => {
  it.each([
    [0.5, 0.6914625],
    [1, 0.8413447],
    [2, 0.9772499],
    [3, 0.9986501],
  ])("Φ(%s) = %s", (z, v) => {
    expect(Math.abs(normCdf(z) - v)).toBeLessThan(5e-8);
  });
});

describe("gamma function through the Weibull mean λ·Γ(1 + 1/k) — A&S (1964) Table 6.1; NIST/SEMATECH e-Handbook §1.3.6.6", () => {
  it.each([
    [2, 0.8862269], // Γ(1.5)
    [4, 0.9064025], // Γ(1.25)
    [5, 0.9181687], // Γ(1.2)
  ])("shape %s, scale 1: mean = %s", (k, g) => {
    const w = makeLifetime({ distribution: "weibull", shape: k, scale: 1 }, "t");
    expect(Math.abs(w.mean - g)).toBeLessThan(5e-8);
    expect(Math.abs(gamma(1 + 1 / k) - g)).toBeLessThan(5e-8);
  });
});

// Reference library: @stdlib/stats-base-dists-* (npm), independent of src/cohort/special.ts.
// Argument orders: weibull-cdf(x, k, λ); gamma-cdf(x, α, β) with β a RATE (1/scale);
// lognormal-cdf(x, μ, σ) of the logarithm; normal-cdf(x, μ, σ); logistic-cdf(x, μ, s).
const XS = [0.3, 1, 2.5, 5, 10, 17.3, 25, 40, 60, 90];

function compare(lt: Lifetime, refCdf: (x: number) => number, refSf: (x: number) => number, tol = 1e-12) {
  for (const x of XS) {
    const F = refCdf(x);
    const S = refSf(x);
    if (F > 1e-300) expect(rel(lt.cdf(x), F), `cdf(${x})`).toBeLessThan(tol);
    if (S > 1e-300) expect(rel(lt.sf(x), S), `sf(${x})`).toBeLessThan(tol);
  }
}

describe("CDF and survival against @stdlib (general-purpose reference library)", () => {
  it("weibull (shape, scale) and the survival function in the far tail", () => {
    const k = 2.3, lam = 14;
    const lt = makeLifetime({ distribution: "weibull", shape: k, scale: lam }, "t");
    // Tail reference: S(x) = exp(−(x/λ)^k) exactly (NIST §1.3.6.6.8); CDF from stdlib.
    compare(lt, (x) => weibullCdf(x, k, lam), (x) => Math.exp(-Math.pow(x / lam, k)), 1e-11);
  });

  it("gamma (shape, scale): stdlib takes the rate 1/scale", () => {
    const k = 3.7, th = 6.5;
    const lt = makeLifetime({ distribution: "gamma", shape: k, scale: th }, "t");
    for (const x of XS) expect(rel(lt.cdf(x), gammaCdf(x, k, 1 / th)), `cdf(${x})`).toBeLessThan(1e-10);
    for (const x of XS.slice(0, 6)) expect(rel(lt.sf(x), 1 - gammaCdf(x, k, 1 / th)), `sf(${x})`).toBeLessThan(1e-9);
  });

  it("lognormal from the mean and sd of the lifetime (NIST §1.3.6.6.9 moment formulas)", () => {
    const m = 30, sd = 12;
    const s2 = Math.log(1 + (sd * sd) / (m * m));
    const mu = Math.log(m) - s2 / 2;
    const lt = makeLifetime({ distribution: "lognormal", mean: m, sd }, "t");
    // Survival through the normal relation, accurate in the tail: S(x) = Φ(−(ln x − μ)/σ).
    compare(lt, (x) => lognormalCdf(x, mu, Math.sqrt(s2)), (x) => normalCdf(-(Math.log(x) - mu) / Math.sqrt(s2), 0, 1), 1e-11);
    // NIST: mean = exp(μ + σ²/2), variance = (exp(σ²) − 1)·exp(2μ + σ²)
    expect(rel(Math.exp(mu + s2 / 2), m)).toBeLessThan(1e-14);
    expect(rel(Math.sqrt((Math.exp(s2) - 1) * Math.exp(2 * mu + s2)), sd)).toBeLessThan(1e-13);
  });

  it("normal, including the far upper tail", () => {
    const lt = makeLifetime({ distribution: "normal", mean: 20, sd: 6 }, "t");
    compare(lt, (x) => normalCdf(x, 20, 6), (x) => normalCdf(-x, -20, 6), 1e-11);
    expect(rel(lt.belowZero, normalCdf(0, 20, 6))).toBeLessThan(1e-11);
  });

  it("truncated normal: the parent renormalised over positive ages; its true mean is not the parent's", () => {
    const mu = 8, sd = 6;
    const lt = makeLifetime({ distribution: "truncated-normal", mean: mu, sd }, "t");
    const z = 1 - normalCdf(0, mu, sd);
    compare(lt, (x) => (normalCdf(x, mu, sd) - normalCdf(0, mu, sd)) / z, (x) => normalCdf(-x, -mu, sd) / z, 1e-10);
    // Closed form E = μ + σ φ(α)/(1 − Φ(α)), α = −μ/σ (standard result for the truncated normal).
    const a = -mu / sd;
    const phi = Math.exp(-a * a / 2) / Math.sqrt(2 * Math.PI);
    expect(rel(lt.mean, mu + (sd * phi) / (1 - normalCdf(a, 0, 1)))).toBeLessThan(1e-12);
    expect(lt.mean).toBeGreaterThan(mu);
  });

  it("log-logistic: ln X is logistic with location ln α and scale 1/β (standard relation)", () => {
    const beta = 4.2, alpha = 22;
    const lt = makeLifetime({ distribution: "loglogistic", shape: beta, scale: alpha }, "t");
    compare(lt, (x) => logisticCdf(Math.log(x), Math.log(alpha), 1 / beta), (x) => logisticCdf(-Math.log(x), -Math.log(alpha), 1 / beta), 1e-12);
  });

  it("exponential", () => {
    const lt = makeLifetime({ distribution: "exponential", mean: 7 }, "t");
    compare(lt, (x) => gammaCdf(x, 1, 1 / 7), (x) => Math.exp(-x / 7), 1e-12);
  });
});

describe("moment matching from mean and sd", () => {
  it.each([
    ["weibull", 25, 7.5],
    ["gamma", 25, 7.5],
    ["loglogistic", 25, 7.5],
    ["lognormal", 25, 7.5],
  ])("%s(mean %s, sd %s) has that mean and sd (numeric integration of the density)", (d, m, sd) => {
    const lt = makeLifetime({ distribution: d as string, mean: m as number, sd: sd as number }, "t");
    expect(rel(lt.mean, m as number)).toBeLessThan(1e-9);
    // E[X] = ∫ S, E[X²] = ∫ 2x S (standard survival-analysis identities), trapezoid on a fine grid.
    let e1 = 0, e2 = 0;
    const h = 0.005;
    for (let x = 0; x < 2000; x += h) {
      const s0 = lt.sf(x), s1 = lt.sf(x + h);
      e1 += (h * (s0 + s1)) / 2;
      e2 += (h * (2 * x * s0 + 2 * (x + h) * s1)) / 2;
    }
    expect(rel(e1, m as number)).toBeLessThan(1e-5);
    expect(rel(Math.sqrt(e2 - e1 * e1), sd as number)).toBeLessThan(1e-4);
  });

  it("log-logistic with shape ≤ 2 has no finite sd: the error says so", () => {
    expect(() => makeLifetime({ distribution: "loglogistic", mean: 10, sd: 1e7 }, "series region=A")).toThrow(/series region=A: parameter sd: .*sd is finite only for shape > 2/);
  });
});

describe("mean lifetime = area under the survival curve (standard result of survival analysis)", () => {
  it.each([
    [{ distribution: "weibull", shape: 3, scale: 20 }],
    [{ distribution: "gamma", shape: 4, scale: 5 }],
    [{ distribution: "lognormal", mean: 20, sd: 8 }],
    [{ distribution: "truncated-normal", mean: 10, sd: 8 }],
    [{ distribution: "loglogistic", shape: 5, scale: 18 }],
    [{ distribution: "exponential", mean: 12 }],
  ])("%o", (p) => {
    const lt = makeLifetime(p as never, "t");
    let area = 0;
    const h = 0.002;
    for (let x = 0; x < 3000; x += h) area += (h * (lt.sf(x) + lt.sf(x + h))) / 2;
    expect(rel(area, lt.mean)).toBeLessThan(2e-5);
  });
});

describe("discrete lifetime distributions sum to 1 (standard probability)", () => {
  it.each(["weibull", "gamma", "lognormal", "normal", "truncated-normal", "loglogistic", "exponential"])("%s", (d) => {
    const p = d === "exponential" ? { distribution: d, mean: 9 } : { distribution: d, mean: 15, sd: 5 };
    const lt = makeLifetime(p as never, "t");
    const n = 3000;
    const leave = leavingVector(lt, n);
    const sigma = survivalVector(lt, n);
    const sum = leave.reduce((a, b) => a + b, 0);
    expect(Math.abs(sum + sigma[n - 1]! - 1)).toBeLessThan(1e-12);
    expect(sigma[n - 1]!).toBeLessThan(d === "loglogistic" ? 1e-5 : 1e-12);
    for (let a = 1; a < 200; a++) expect(Math.abs(sigma[a - 1]! - leave[a]! - sigma[a]!)).toBeLessThan(1e-15);
  });
});

describe("parameter validation names the parameter", () => {
  it.each([
    [{ distribution: "normal", mean: 10, sd: 0 }, /parameter sd: sd must be a finite number > 0 \(got 0\)/],
    [{ distribution: "weibull", shape: -1, scale: 3 }, /parameter shape: shape must be a finite number > 0/],
    [{ distribution: "gamma", mean: 10 }, /distribution gamma takes shape and scale, or mean and sd; missing sd/],
    [{ distribution: "exponential", mean: 10, sd: 2 }, /distribution exponential takes mean; surplus sd/],
    [{ distribution: "lognormal", mean: Number.NaN, sd: 2 }, /parameter mean/],
    [{ distribution: "weibel", mean: 10, sd: 2 }, /unknown distribution "weibel"; did you mean "weibull"\? \(accepted: fixed, normal/],
    [{ distribution: "fixed", mean: -3 }, /parameter mean: mean must be a finite number ≥ 0/],
  ])("%o", (p, re) => {
    expect(() => makeLifetime(p as never, "series region=ALD, product=cars")).toThrow(re);
    expect(() => makeLifetime(p as never, "series region=ALD, product=cars")).toThrow(/^series region=ALD, product=cars: /);
  });
});
