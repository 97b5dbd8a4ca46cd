/**
 * Concrete one-dimensional distributions ("marginals") of an uncertain quantity: draw, quantile
 * (inverse CDF), CDF, the map from a normal score, and the exact mean and variance.
 *
 * Draws (`sample`) go through jstat's samplers and therefore through jstat's current random
 * source: call them inside `withRandom(rng, …)` (random.ts). Quantiles serve Latin hypercube
 * sampling and the Gaussian copula (`fromScore(z)` = quantile(Φ(z)), computed directly for the
 * normal and lognormal).
 *
 * Closed forms (NIST/SEMATECH e-Handbook of Statistical Methods, §1.3.6.6.1 normal, §1.3.6.6.2
 * uniform, §1.3.6.6.9 lognormal): normal mean μ, variance σ²; uniform mean (a + b)/2, variance
 * (b − a)²/12; lognormal with log-mean m and log-sd s: mean e^(m + s²/2), variance
 * (e^(s²) − 1)e^(2m + s²). Triangular (min a, mode c, max b; not in the NIST gallery): mean
 * (a + b + c)/3, variance (a² + b² + c² − ab − ac − bc)/18 (Johnson, Kotz & Balakrishnan,
 * Continuous Univariate Distributions vol. 2, 1995, ch. 26 §9, from memory; the tests check both
 * by exact quadrature). Truncated normal: normal.ts.
 */
import pkg from "jstat";
import { normCdf, normCdfFast, normQuantile, truncatedNormal, truncatedNormalCdf, truncatedNormalQuantile } from "./normal.js";

const { jStat } = pkg;

export type MarginalFamily = "normal" | "truncated-normal" | "lognormal" | "uniform" | "triangular" | "point";

export interface Marginal {
  readonly family: MarginalFamily;
  /** Parameters in the quantity's units, for messages and tests. */
  readonly params: Readonly<Record<string, number>>;
  readonly mean: number;
  readonly variance: number;
  /** One draw from jstat's current random source (call inside withRandom). */
  sample(): number;
  /** Inverse CDF for 0 < p < 1. */
  quantile(p: number): number;
  cdf(x: number): number;
  /** quantile(Φ(z)): the value whose normal score is z (Gaussian copula). */
  fromScore(z: number): number;
}

/** Largest double below 1, and the smallest positive p used when Φ(z) rounds to 0 or 1. */
const P_MIN = 2 ** -1074;
const P_MAX = 1 - 2 ** -53;

function scoreToP(z: number): number {
  const p = normCdfFast(z);
  return p < P_MIN ? P_MIN : p > P_MAX ? P_MAX : p;
}

export function pointMarginal(value: number): Marginal {
  return {
    family: "point",
    params: { value },
    mean: value,
    variance: 0,
    sample: () => value,
    quantile: () => value,
    cdf: (x) => (x >= value ? 1 : 0),
    fromScore: () => value,
  };
}

export function normalMarginal(mean: number, sd: number): Marginal {
  if (sd === 0) return pointMarginal(mean);
  return {
    family: "normal",
    params: { mean, sd },
    mean,
    variance: sd * sd,
    sample: () => jStat.normal.sample(mean, sd),
    quantile: (p) => mean + sd * normQuantile(p),
    cdf: (x) => normCdf((x - mean) / sd),
    fromScore: (z) => mean + sd * z,
  };
}

/** N(mu, sigma²) truncated below at `lower`; drawn by inverse CDF of one jstat uniform (no rejection). */
export function truncatedNormalMarginal(mu: number, sigma: number, lower: number): Marginal {
  const t = truncatedNormal(mu, sigma, lower);
  return {
    family: "truncated-normal",
    params: { mu, sigma, lower },
    mean: t.mean,
    variance: t.variance,
    sample: () => truncatedNormalQuantile(t, jStat._random_fn()),
    quantile: (p) => truncatedNormalQuantile(t, p),
    cdf: (x) => truncatedNormalCdf(t, x),
    fromScore: (z) => truncatedNormalQuantile(t, scoreToP(z)),
  };
}

/** Lognormal given by the mean and sd of the quantity itself (mean > 0). */
export function lognormalMarginal(mean: number, sd: number): Marginal {
  if (sd === 0) return pointMarginal(mean);
  const s2 = Math.log1p((sd / mean) * (sd / mean));
  const s = Math.sqrt(s2);
  const m = Math.log(mean) - s2 / 2;
  return {
    family: "lognormal",
    params: { mean, sd, log_mean: m, log_sd: s },
    mean: Math.exp(m + s2 / 2),
    variance: Math.expm1(s2) * Math.exp(2 * m + s2),
    sample: () => jStat.lognormal.sample(m, s),
    quantile: (p) => Math.exp(m + s * normQuantile(p)),
    cdf: (x) => (x <= 0 ? 0 : normCdf((Math.log(x) - m) / s)),
    fromScore: (z) => Math.exp(m + s * z),
  };
}

export function uniformMarginal(min: number, max: number): Marginal {
  if (min === max) return pointMarginal(min);
  return {
    family: "uniform",
    params: { min, max },
    mean: (min + max) / 2,
    variance: ((max - min) * (max - min)) / 12,
    sample: () => jStat.uniform.sample(min, max),
    quantile: (p) => jStat.uniform.inv(p, min, max),
    cdf: (x) => jStat.uniform.cdf(x, min, max),
    fromScore: (z) => jStat.uniform.inv(scoreToP(z), min, max),
  };
}

export function triangularMarginal(min: number, mode: number, max: number): Marginal {
  if (min === max) return pointMarginal(min);
  return {
    family: "triangular",
    params: { min, mode, max },
    mean: (min + mode + max) / 3,
    variance: (min * min + mode * mode + max * max - min * mode - min * max - mode * max) / 18,
    // jstat's argument order is (min, max, mode)
    sample: () => jStat.triangular.sample(min, max, mode),
    quantile: (p) => jStat.triangular.inv(p, min, max, mode),
    cdf: (x) => jStat.triangular.cdf(x, min, max, mode),
    fromScore: (z) => jStat.triangular.inv(scoreToP(z), min, max, mode),
  };
}
