/**
 * Standard normal quantile and the lower-truncated normal: quantile and exact moments.
 *
 * Φ⁻¹: Wichura, "Algorithm AS 241: The percentage points of the normal distribution", Applied
 * Statistics 37(3), 1988, 477–484 (PPND16, relative error about 1e−16). jstat's own `normal.inv`
 * was not used: it refines through erfc = 1 − erf and loses precision in the tails (relative error
 * 2e−8 at p = 1e−10, wrong at p = 1e−100), and costs about 390 ns a call.
 * Φ and Q = 1 − Φ come from src/cohort/special.ts (each computed directly, full precision in the
 * tails). `normCdfFast` is Φ through erfc by Cody's rational Chebyshev approximations (W. J. Cody,
 * "Rational Chebyshev approximations for the error function", Mathematics of Computation 23,
 * 1969, 631–637; the coefficient sets of his SPECFUN routine CALERF), about 15× faster than the
 * series/continued fraction of special.ts, relative error within (1 + z²)·4e−16 (the rounding
 * of z/√2 grows with the tail: 3e−14 at z = −8, 2e−13 at z = −37); used for the copula map of
 * each draw.
 *
 * Lower truncation at a of N(μ, σ²): α = (a − μ)/σ, λ = φ(α)/Q(α) (the inverse Mills ratio);
 * mean μ + σλ, variance σ²(1 + αλ − λ²) (Johnson, Kotz & Balakrishnan, Continuous Univariate
 * Distributions vol. 1, 2nd ed. 1994, §10.1 of ch. 13; from memory, and checked in the tests by
 * numerical integration). Quantile: with t = Φ(α), x_p = μ + σΦ⁻¹(t + p(1 − t)); when α > 0 the
 * same is computed through upper tails, x_p = μ − σΦ⁻¹(Q(α)(1 − p)), so a truncation far above
 * the mean keeps full precision.
 */
import { normCdf, normPdf, normSf } from "../cohort/special.js";

export { normCdf, normSf, normPdf };

/** Standard normal quantile Φ⁻¹(p) for 0 < p < 1 (−∞ at 0, +∞ at 1, NaN outside). */
export function normQuantile(p: number): number {
  if (!(p >= 0 && p <= 1)) return NaN;
  if (p === 0) return -Infinity;
  if (p === 1) return Infinity;
  const q = p - 0.5;
  if (Math.abs(q) <= 0.425) {
    const r = 0.180625 - q * q;
    return (
      (q *
        (((((((2509.0809287301226727 * r + 33430.575583588128105) * r + 67265.770927008700853) * r + 45921.953931549871457) * r +
          13731.693765509461125) *
          r +
          1971.5909503065514427) *
          r +
          133.14166789178437745) *
          r +
          3.387132872796366608)) /
      (((((((5226.495278852854561 * r + 28729.085735721942674) * r + 39307.89580009271061) * r + 21213.794301586595867) * r +
        5394.1960214247511077) *
        r +
        687.1870074920579083) *
        r +
        42.313330701600911252) *
        r +
        1)
    );
  }
  let r = Math.sqrt(-Math.log(q < 0 ? p : 1 - p));
  let x: number;
  if (r <= 5) {
    r -= 1.6;
    x =
      (((((((7.7454501427834140764e-4 * r + 0.0227238449892691845833) * r + 0.24178072517745061177) * r + 1.27045825245236838258) * r +
        3.64784832476320460504) *
        r +
        5.7694972214606914055) *
        r +
        4.6303378461565452959) *
        r +
        1.42343711074968357734) /
      (((((((1.05075007164441684324e-9 * r + 5.475938084995344946e-4) * r + 0.0151986665636164571966) * r + 0.14810397642748007459) * r +
        0.68976733498510000455) *
        r +
        1.6763848301838038494) *
        r +
        2.05319162663775882187) *
        r +
        1);
  } else {
    r -= 5;
    x =
      (((((((2.01033439929228813265e-7 * r + 2.71155556874348757815e-5) * r + 0.0012426609473880784386) * r + 0.026532189526576123093) * r +
        0.29656057182850489123) *
        r +
        1.7848265399172913358) *
        r +
        5.4637849111641143699) *
        r +
        6.6579046435011037772) /
      (((((((2.04426310338993978564e-15 * r + 1.4215117583164458887e-7) * r + 1.8463183175100546818e-5) * r + 7.868691311456132591e-4) * r +
        0.0148753612908506148525) *
        r +
        0.13692988092273580531) *
        r +
        0.59983220655588793769) *
        r +
        1);
  }
  return q < 0 ? -x : x;
}

const SQRPI = 5.6418958354775628695e-1; // 1/√π

/** erfc(y) for y ≥ 0 (Cody 1969, CALERF). */
function erfcPos(y: number): number {
  if (y <= 0.46875) {
    const z = y * y;
    const num = (((1.85777706184603153e-1 * z + 3.16112374387056560) * z + 1.13864154151050156e2) * z + 3.77485237685302021e2) * z + 3.20937758913846947e3;
    const den = (((z + 2.36012909523441209e1) * z + 2.44024637934444173e2) * z + 1.28261652607737228e3) * z + 2.84423683343917062e3;
    return 1 - (y * num) / den;
  }
  let r: number;
  if (y <= 4) {
    const num =
      (((((((2.15311535474403846e-8 * y + 5.64188496988670089e-1) * y + 8.88314979438837594) * y + 6.61191906371416295e1) * y + 2.98635138197400131e2) * y +
        8.81952221241769090e2) *
        y +
        1.71204761263407058e3) *
        y +
        2.05107837782607147e3) *
        y +
      1.23033935479799725e3;
    const den =
      (((((((y + 1.57449261107098347e1) * y + 1.17693950891312499e2) * y + 5.37181101862009858e2) * y + 1.62138957456669019e3) * y + 3.29079923573345963e3) * y +
        4.36261909014324716e3) *
        y +
        3.43936767414372164e3) *
        y +
      1.23033935480374942e3;
    r = num / den;
  } else {
    if (y >= 26.6) return 0;
    const z = 1 / (y * y);
    const num = ((((1.63153871373020978e-2 * z + 3.05326634961232344e-1) * z + 3.60344899949804439e-1) * z + 1.25781726111229246e-1) * z + 1.60837851487422766e-2) * z + 6.58749161529837803e-4;
    const den = ((((z + 2.56852019228982242) * z + 1.87295284992346047) * z + 5.27905102951428412e-1) * z + 6.05183413124413191e-2) * z + 2.33520497626869185e-3;
    r = (SQRPI - (z * num) / den) / y;
  }
  // exp(−y²) in two factors, as CALERF does, so the rounding of y² is not amplified.
  const ysq = Math.trunc(y * 16) / 16;
  const del = (y - ysq) * (y + ysq);
  return Math.exp(-ysq * ysq) * Math.exp(-del) * r;
}

/** Standard normal CDF Φ(z) by Cody's erfc (fast; for the per-draw copula map). */
export function normCdfFast(z: number): number {
  const x = -z * Math.SQRT1_2;
  return x >= 0 ? 0.5 * erfcPos(x) : 1 - 0.5 * erfcPos(-x);
}

/** Φ⁻¹ of the upper-tail probability q: the z with Q(z) = q, exact for tiny q. */
export function normQuantileUpper(q: number): number {
  return -normQuantile(q);
}

export interface TruncatedNormal {
  mu: number;
  sigma: number;
  lower: number;
  /** (lower − μ)/σ */
  alpha: number;
  /** Q(α): the share of the untruncated normal kept. */
  kept: number;
  /** Φ(α): the share cut off. */
  cut: number;
  mean: number;
  variance: number;
}

/** A normal N(μ, σ²) truncated below at `lower`; throws when the kept share underflows. */
export function truncatedNormal(mu: number, sigma: number, lower: number): TruncatedNormal {
  const alpha = (lower - mu) / sigma;
  const kept = normSf(alpha);
  if (!(kept > 1e-300)) {
    throw new RangeError(
      `truncation at ${lower} lies ${alpha.toPrecision(4)} standard deviations above the centre ${mu} (sd ${sigma}): almost nothing of the normal is left; accepted: a truncation point less than about 37 sd above the centre`,
    );
  }
  const lambda = normPdf(alpha) / kept;
  const variance = sigma * sigma * Math.max(0, 1 + alpha * lambda - lambda * lambda);
  return { mu, sigma, lower, alpha, kept, cut: normCdf(alpha), mean: mu + sigma * lambda, variance };
}

/** Quantile of a lower-truncated normal, 0 < p < 1. */
export function truncatedNormalQuantile(t: TruncatedNormal, p: number): number {
  let z: number;
  if (t.alpha > 0) z = -normQuantile(t.kept * (1 - p));
  else z = normQuantile(t.cut + p * t.kept);
  const x = t.mu + t.sigma * z;
  return x < t.lower ? t.lower : x;
}

/** CDF of a lower-truncated normal. */
export function truncatedNormalCdf(t: TruncatedNormal, x: number): number {
  if (x <= t.lower) return 0;
  const z = (x - t.mu) / t.sigma;
  // P(α < Z ≤ z)/Q(α), computed through upper tails: (Q(α) − Q(z))/Q(α).
  return (t.kept - normSf(z)) / t.kept;
}
