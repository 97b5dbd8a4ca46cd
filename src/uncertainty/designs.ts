/**
 * Sampling designs for D draws of K uncertain inputs, seeded and reproducible.
 *
 *   random  plain Monte Carlo: independent draws from each input's jstat sampler, draw by draw
 *           (for d, for k), all from one generator.
 *   lhs     Latin hypercube (McKay, Beckman & Conover, Technometrics 21(2), 1979, 239–245): for
 *           each input the D equal-probability strata of (0, 1) are put in a random order
 *           (Fisher–Yates shuffle, Knuth TAOCP vol. 2 Algorithm 3.4.2P), a uniform point is taken
 *           within each stratum, u = (stratum + U)/D, and the input's quantile maps u to a value.
 *           Inputs are generated one after the other (shuffle, then D points), each input's
 *           strata independent of the others'.
 * Layout: draw-major, value of input k in draw d at [d·K + k].
 */
import type { Marginal } from "./marginals.js";
import { withRandom, type Rng } from "./random.js";

export type SamplingDesign = "random" | "lhs";
export const SAMPLING_DESIGNS: readonly SamplingDesign[] = ["random", "lhs"];

function checkSizes(draws: number, dims: number): void {
  if (!Number.isInteger(draws) || draws < 1) throw new RangeError(`number of draws must be a whole number ≥ 1 (got ${draws})`);
  if (!Number.isInteger(dims) || dims < 1) throw new RangeError(`number of inputs must be a whole number ≥ 1 (got ${dims})`);
}

/** A random order of 0 … n − 1. */
export function permutation(n: number, rng: Rng): Int32Array {
  const p = new Int32Array(n);
  for (let i = 0; i < n; i++) p[i] = i;
  for (let i = n - 1; i > 0; i--) {
    const j = rng.below(i + 1);
    const t = p[i]!;
    p[i] = p[j]!;
    p[j] = t;
  }
  return p;
}

/** Uniform points in (0, 1)^K, draw-major, by the given design. */
export function uniformDesign(design: SamplingDesign, draws: number, dims: number, rng: Rng): Float64Array {
  checkSizes(draws, dims);
  const u = new Float64Array(draws * dims);
  if (design === "random") {
    for (let i = 0; i < u.length; i++) u[i] = rng.uniform();
    return u;
  }
  if (design !== "lhs") throw new RangeError(`unknown sampling design ${JSON.stringify(design)}; accepted: ${SAMPLING_DESIGNS.join(", ")}`);
  for (let k = 0; k < dims; k++) {
    const perm = permutation(draws, rng);
    for (let d = 0; d < draws; d++) u[d * dims + k] = (perm[d]! + rng.uniform()) / draws;
  }
  return u;
}

/** D draws of K inputs (draw-major), by the given design. */
export function sampleInputs(marginals: readonly Marginal[], design: SamplingDesign, draws: number, rng: Rng): Float64Array {
  const dims = marginals.length;
  checkSizes(draws, dims);
  if (design === "random") {
    const out = new Float64Array(draws * dims);
    withRandom(rng, () => {
      for (let d = 0; d < draws; d++) for (let k = 0; k < dims; k++) out[d * dims + k] = marginals[k]!.sample();
    });
    return out;
  }
  const u = uniformDesign(design, draws, dims, rng);
  for (let d = 0; d < draws; d++) for (let k = 0; k < dims; k++) u[d * dims + k] = marginals[k]!.quantile(u[d * dims + k]!);
  return u;
}

/** n independent draws of one marginal through its jstat sampler, into `out` if given. */
export function sampleMarginal(m: Marginal, n: number, rng: Rng, out = new Float64Array(n)): Float64Array {
  if (out.length < n) throw new RangeError(`output holds ${out.length} values; ${n} needed`);
  withRandom(rng, () => {
    for (let i = 0; i < n; i++) out[i] = m.sample();
  });
  return out;
}
