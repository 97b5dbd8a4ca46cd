/**
 * Yearly paths through anchor values. Pure functions, no I/O.
 *
 * - `linear`: straight lines between anchors (kinks at every anchor: the stock-driven inflow, a
 *   difference of the stock path, then jumps there).
 * - `monotone-cubic`: the piecewise cubic Hermite interpolant of Fritsch and Carlson (SIAM J.
 *   Numer. Anal. 17(2), 238–246, 1980): continuous first derivative, and monotone wherever the
 *   data are. Steps: secants Δk = (y(k+1) − yk)/hk; initial slopes from the three-point formula
 *   dk = (h(k)·Δ(k−1) + h(k−1)·Δk)/(h(k−1) + hk) inside, the secant at either end; a slope is 0
 *   where the adjacent secants differ in sign or one is 0 (a local extremum or a flat piece);
 *   then on every interval, with α = dk/Δk and β = d(k+1)/Δk, if α² + β² > 9 both slopes are
 *   scaled by τ = 3/√(α² + β²), which keeps the piece monotone (the paper's sufficient region).
 * - `step`: each anchor's value holds until the next anchor.
 */

export const PATH_METHODS = ["linear", "monotone-cubic", "step"] as const;
export type PathMethod = (typeof PATH_METHODS)[number];

/** Slopes at the anchors for the monotone cubic (xs strictly increasing, at least two anchors). */
export function monotoneSlopes(xs: readonly number[], ys: readonly number[]): Float64Array {
  const n = xs.length;
  const h = new Float64Array(n - 1);
  const delta = new Float64Array(n - 1);
  for (let k = 0; k < n - 1; k++) {
    h[k] = xs[k + 1]! - xs[k]!;
    delta[k] = (ys[k + 1]! - ys[k]!) / h[k]!;
  }
  const d = new Float64Array(n);
  d[0] = delta[0]!;
  d[n - 1] = delta[n - 2]!;
  for (let k = 1; k < n - 1; k++) {
    const a = delta[k - 1]!;
    const b = delta[k]!;
    d[k] = a * b <= 0 ? 0 : (h[k]! * a + h[k - 1]! * b) / (h[k - 1]! + h[k]!);
  }
  for (let k = 0; k < n - 1; k++) {
    const dk = delta[k]!;
    if (dk === 0) {
      d[k] = 0;
      d[k + 1] = 0;
      continue;
    }
    // An end slope of the wrong sign (possible only at the ends with the secant start) is set to 0.
    let alpha = d[k]! / dk;
    let beta = d[k + 1]! / dk;
    if (alpha < 0) { d[k] = 0; alpha = 0; }
    if (beta < 0) { d[k + 1] = 0; beta = 0; }
    const r = alpha * alpha + beta * beta;
    if (r > 9) {
      const tau = 3 / Math.sqrt(r);
      d[k] = tau * alpha * dk;
      d[k + 1] = tau * beta * dk;
    }
  }
  return d;
}

/** Cubic Hermite value on [x0, x1] with values y0, y1 and slopes d0, d1 at x. */
export function hermite(x: number, x0: number, x1: number, y0: number, y1: number, d0: number, d1: number): number {
  const h = x1 - x0;
  const t = (x - x0) / h;
  const t2 = t * t;
  const t3 = t2 * t;
  return (2 * t3 - 3 * t2 + 1) * y0 + (t3 - 2 * t2 + t) * h * d0 + (-2 * t3 + 3 * t2) * y1 + (t3 - t2) * h * d1;
}

/**
 * Values at `xq` (each within [xs[0], xs[n−1]]) of the path through (xs, ys). xs strictly
 * increasing; one anchor gives a constant path.
 */
export function interpolate(xs: readonly number[], ys: readonly number[], xq: readonly number[], method: PathMethod): Float64Array {
  const n = xs.length;
  const out = new Float64Array(xq.length);
  if (n === 0) throw new RangeError("no anchor");
  for (let k = 1; k < n; k++) if (!(xs[k]! > xs[k - 1]!)) throw new RangeError(`anchors must be strictly increasing (${xs[k - 1]} then ${xs[k]})`);
  const d = method === "monotone-cubic" && n > 1 ? monotoneSlopes(xs, ys) : null;
  let k = 0;
  xq.forEach((x, i) => {
    if (x < xs[0]! || x > xs[n - 1]!) throw new RangeError(`${x} lies outside the anchors ${xs[0]}–${xs[n - 1]}`);
    if (n === 1) {
      out[i] = ys[0]!;
      return;
    }
    if (x < xs[k]!) k = 0;
    while (k < n - 2 && x > xs[k + 1]!) k++;
    const x0 = xs[k]!, x1 = xs[k + 1]!, y0 = ys[k]!, y1 = ys[k + 1]!;
    if (x === x0) out[i] = y0;
    else if (x === x1) out[i] = y1;
    else if (method === "step") out[i] = y0;
    else if (method === "linear") out[i] = y0 + ((y1 - y0) * (x - x0)) / (x1 - x0);
    else out[i] = hermite(x, x0, x1, y0, y1, d![k]!, d![k + 1]!);
  });
  return out;
}
