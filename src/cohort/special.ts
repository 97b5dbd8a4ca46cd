/**
 * Special functions with full double precision in the tails (survival is computed from these,
 * never as 1 − CDF where the tail matters).
 */

const SQRT_PI = Math.sqrt(Math.PI);

/** erf by its all-positive series (no cancellation), for |x| < 2. */
function erfSeries(x: number): number {
  // erf(x) = 2/√π · e^(−x²) · Σ 2^n x^(2n+1) / (1·3·…·(2n+1))
  let term = x;
  let sum = x;
  const x2 = 2 * x * x;
  for (let n = 1; n < 200; n++) {
    term *= x2 / (2 * n + 1);
    sum += term;
    if (Math.abs(term) < 1e-17 * Math.abs(sum)) break;
  }
  return (2 / SQRT_PI) * Math.exp(-x * x) * sum;
}

/** erfc(x) for x ≥ 1 by its continued fraction (modified Lentz). */
function erfcFraction(x: number): number {
  // erfc x = (2x e^(−x²)/√π) / (2x²+1 − 1·2/(2x²+5 − 3·4/(2x²+9 − …)))
  const tiny = 1e-300;
  const z = 2 * x * x;
  let f = z + 1;
  let c = f;
  let d = 0;
  for (let n = 1; n < 10000; n++) {
    const a = -(2 * n - 1) * (2 * n);
    const b = z + 1 + 4 * n;
    d = b + a * d;
    if (Math.abs(d) < tiny) d = tiny;
    c = b + a / c;
    if (Math.abs(c) < tiny) c = tiny;
    d = 1 / d;
    const delta = c * d;
    f *= delta;
    if (Math.abs(delta - 1) < 1e-16) break;
  }
  return ((2 * x * Math.exp(-x * x)) / SQRT_PI) / f;
}

export function erfc(x: number): number {
  if (Number.isNaN(x)) return NaN;
  if (x < 0) return 2 - erfc(-x);
  if (x < 1) return 1 - erfSeries(x);
  if (x > 27) return 0;
  return erfcFraction(x);
}

export function erf(x: number): number {
  if (Math.abs(x) < 1) return erfSeries(x);
  return x > 0 ? 1 - erfc(x) : erfc(-x) - 1;
}

/** Standard normal CDF Φ(z). */
export function normCdf(z: number): number {
  return 0.5 * erfc(-z / Math.SQRT2);
}

/** Standard normal upper tail Q(z) = 1 − Φ(z), computed directly. */
export function normSf(z: number): number {
  return 0.5 * erfc(z / Math.SQRT2);
}

export function normPdf(z: number): number {
  return Math.exp(-0.5 * z * z) / Math.sqrt(2 * Math.PI);
}

const LANCZOS = [
  0.99999999999980993, 676.5203681218851, -1259.1392167224028, 771.32342877765313, -176.61502916214059,
  12.507343278686905, -0.13857109526572012, 9.9843695780195716e-6, 1.5056327351493116e-7,
];

/** ln Γ(x) for x > 0 (Lanczos, g = 7). */
export function lnGamma(x: number): number {
  if (x < 0.5) return Math.log(Math.PI / Math.abs(Math.sin(Math.PI * x))) - lnGamma(1 - x);
  const xx = x - 1;
  let a = LANCZOS[0]!;
  const t = xx + 7.5;
  for (let i = 1; i < 9; i++) a += LANCZOS[i]! / (xx + i);
  return 0.5 * Math.log(2 * Math.PI) + (xx + 0.5) * Math.log(t) - t + Math.log(a);
}

export function gamma(x: number): number {
  if (x < 0.5) return Math.PI / (Math.sin(Math.PI * x) * gamma(1 - x));
  return Math.exp(lnGamma(x));
}

/** Regularised lower incomplete gamma P(a, x) and upper Q(a, x), each computed where it is accurate. */
export function gammaPQ(a: number, x: number): { p: number; q: number } {
  if (x <= 0) return { p: 0, q: 1 };
  if (!Number.isFinite(x)) return { p: 1, q: 0 };
  const lnPre = -x + a * Math.log(x) - lnGamma(a);
  if (x < a + 1) {
    let ap = a;
    let del = 1 / a;
    let sum = del;
    for (let n = 0; n < 100000; n++) {
      ap += 1;
      del *= x / ap;
      sum += del;
      if (Math.abs(del) < Math.abs(sum) * 1e-17) break;
    }
    const p = sum * Math.exp(lnPre);
    return { p, q: 1 - p };
  }
  const tiny = 1e-300;
  let b = x + 1 - a;
  let c = 1 / tiny;
  let d = 1 / b;
  let h = d;
  for (let i = 1; i < 100000; i++) {
    const an = -i * (i - a);
    b += 2;
    d = an * d + b;
    if (Math.abs(d) < tiny) d = tiny;
    c = b + an / c;
    if (Math.abs(c) < tiny) c = tiny;
    d = 1 / d;
    const del = d * c;
    h *= del;
    if (Math.abs(del - 1) < 1e-16) break;
  }
  const q = Math.exp(lnPre) * h;
  return { p: 1 - q, q };
}

/** Solves f(x) = 0 for x in [lo, hi] by bisection on a sign change (f monotone). */
export function bisect(f: (x: number) => number, lo: number, hi: number, iters = 200): number {
  let flo = f(lo);
  for (let i = 0; i < iters; i++) {
    const mid = 0.5 * (lo + hi);
    const fm = f(mid);
    if (fm === 0) return mid;
    if (Math.sign(fm) === Math.sign(flo)) {
      lo = mid;
      flo = fm;
    } else hi = mid;
    if (hi - lo <= 1e-15 * Math.abs(mid)) break;
  }
  return 0.5 * (lo + hi);
}
