/**
 * The midpoint convention (DOMAIN.md): items enter mid-year; σ(a) = S(a + ½) is the share of a
 * cohort still in stock at the end of the year in which it reaches age a; p(0) = F(½) and
 * p(a) = σ(a − 1) − σ(a) is the share leaving at age a.
 */
import type { Lifetime } from "./distributions/types.js";

export const CONVENTIONS = ["midpoint"] as const;
export type Convention = (typeof CONVENTIONS)[number];

export function sigmaAt(lt: Lifetime, a: number): number {
  if (a < 0) return 1;
  return lt.sigmaAt ? lt.sigmaAt(a) : lt.sf(a + 0.5);
}

/**
 * Shares smaller than this are taken as 0 in the survival and leaving vectors. Such a share of
 * any stock is far below 1 g; kept, it would bring subnormal numbers into the kernels, whose
 * every multiplication by one costs tens of cycles on x86 processors (a normal lifetime's
 * leaving vector over 800 years has 7 of them, and the kernels ran at 40 % of their speed).
 */
export const NEGLIGIBLE_SHARE = 1e-300;

const flush = (v: Float64Array): Float64Array => {
  for (let a = 0; a < v.length; a++) if (Math.abs(v[a]!) < NEGLIGIBLE_SHARE) v[a] = 0;
  return v;
};

/** σ(0..n − 1). */
export function survivalVector(lt: Lifetime, n: number): Float64Array {
  const out = new Float64Array(n);
  for (let a = 0; a < n; a++) out[a] = sigmaAt(lt, a);
  return flush(out);
}

/** p(a): the share of a cohort leaving at age a, from whichever of F or S is accurate there. */
export function leavingAt(lt: Lifetime, a: number): number {
  if (lt.sigmaAt) return a === 0 ? 1 - lt.sigmaAt(0) : lt.sigmaAt(a - 1) - lt.sigmaAt(a);
  const hi = a + 0.5;
  const fhi = lt.cdf(hi);
  if (a === 0) return fhi; // includes any mass below age 0 (normal family)
  if (fhi <= 0.5) return fhi - lt.cdf(a - 0.5);
  return lt.sf(a - 0.5) - lt.sf(hi);
}

/** p(0..n − 1), each computed from whichever of F or S is accurate at that age. */
export function leavingVector(lt: Lifetime, n: number): Float64Array {
  const out = new Float64Array(n);
  for (let a = 0; a < n; a++) out[a] = leavingAt(lt, a);
  return flush(out);
}

/** The age, in whole years, beyond which σ is negligible (< eps), capped. */
export function ageHorizon(lt: Lifetime, eps = 1e-13, cap = 2000): number {
  let a = 0;
  while (a < cap && sigmaAt(lt, a) >= eps) a++;
  return Math.max(a, 1);
}
