import { type Lifetime, ParamError } from "./types.js";

/**
 * An empirical curve: σ(a) by whole-year age a = 0, 1, …, n − 1 (the share still in stock at
 * the end of the year in which the cohort reaches age a), non-increasing within [0, 1]. Beyond
 * the last listed age σ is 0: what remains leaves in the following year.
 */
export function tableLifetime(curve: string, ages: readonly number[], survival: readonly number[]): Lifetime {
  if (ages.length === 0) throw new ParamError("curve", `curve ${curve} has no rows`);
  const n = ages.length;
  const order = ages.map((a, i) => [a, survival[i]!] as const).sort((x, y) => x[0] - y[0]);
  const sig = new Float64Array(n);
  for (let i = 0; i < n; i++) {
    const [a, s] = order[i]!;
    if (a !== i) throw new ParamError("curve", `curve ${curve}: ages must run 0, 1, 2, … without gaps; found age ${a} where ${i} was expected`);
    if (!(s >= 0 && s <= 1)) throw new ParamError("curve", `curve ${curve}: survival at age ${a} is ${s}; it must lie within [0, 1]`);
    if (i > 0 && s > sig[i - 1]! + 1e-15) throw new ParamError("curve", `curve ${curve}: survival rises from ${sig[i - 1]} at age ${i - 1} to ${s} at age ${a}; it must not increase`);
    sig[i] = s;
  }
  const sigmaAt = (a: number) => (a < 0 ? 1 : a < n ? sig[a]! : 0);
  let area = 0;
  for (let i = 0; i < n; i++) area += sig[i]!;
  // Continuous reading for reviewers: S(x) = σ(round(x − ½)).
  const sf = (x: number) => sigmaAt(Math.floor(x - 0.5));
  return { family: "table", params: {}, sf, cdf: (x) => 1 - sf(x), mean: area, belowZero: 0, sigmaAt };
}
