/**
 * Correlation across years of a per-series multiplicative error (e.g. on inflows), S series × T
 * years, one Monte Carlo draw at a time.
 *
 *   full         one normal score per series, the same in every year;
 *   independent  one score per series-year;
 *   ar1          z_1 ~ N(0, 1), z_t = ρ·z_(t−1) + √(1 − ρ²)·e_t with e_t ~ N(0, 1): a stationary
 *                first-order autoregression, every z_t standard normal, corr(z_t, z_(t+h)) = ρ^h
 *                (Box & Jenkins, Time Series Analysis, ch. 3; from memory).
 * Each score is mapped to the spread's marginal by x = quantile(Φ(z)) (`Marginal.fromScore`):
 * a Gaussian copula, so every year's marginal is exactly the spread's. The correlation of the
 * values is that of the scores only for a normal marginal (for others it is close, not equal).
 * Scores are drawn by inversion, z = Φ⁻¹(u) with one seeded uniform u each (AS 241, normal.ts;
 * 1.6× faster here than jstat's ratio-of-uniforms normal sampler, and a fixed count of uniforms
 * per score); `ar1` with ρ = 0 draws the same scores as `independent`.
 * Layout: series-major, value of series s in year t at [s·T + t].
 */
import { z } from "zod";
import type { Marginal } from "./marginals.js";
import { normQuantile } from "./normal.js";
import type { Rng } from "./random.js";

export const YearCorrelation = z
  .discriminatedUnion("kind", [
    z.object({ kind: z.literal("full").describe("one draw per series, the same factor in every year") }).strict(),
    z.object({ kind: z.literal("independent").describe("one draw per series and year") }).strict(),
    z
      .object({
        kind: z.literal("ar1").describe("first-order autoregression of the normal scores across years"),
        rho: z
          .number({ error: "rho must be a number" })
          .gt(-1, { error: "rho must lie strictly between −1 and 1 (use kind: full for a fully correlated error)" })
          .lt(1, { error: "rho must lie strictly between −1 and 1 (use kind: full for a fully correlated error)" })
          .describe("correlation of the normal scores of consecutive years"),
      })
      .strict(),
  ])
  .describe("how a series' error is correlated across years");

export type YearCorrelation = z.infer<typeof YearCorrelation>;

/** One draw of the S × T factors (series-major) into `out` (allocated if not given). */
export function yearFactors(
  marginal: Marginal,
  correlation: YearCorrelation,
  series: number,
  years: number,
  rng: Rng,
  out: Float64Array = new Float64Array(series * years),
): Float64Array {
  if (!Number.isInteger(series) || series < 0) throw new RangeError(`number of series must be a whole number ≥ 0 (got ${series})`);
  if (!Number.isInteger(years) || years < 1) throw new RangeError(`number of years must be a whole number ≥ 1 (got ${years})`);
  if (out.length < series * years) throw new RangeError(`output holds ${out.length} values; ${series * years} needed`);
  if (correlation.kind === "full") {
    for (let s = 0; s < series; s++) {
      const x = marginal.fromScore(normQuantile(rng.uniform()));
      out.fill(x, s * years, (s + 1) * years);
    }
  } else if (correlation.kind === "independent") {
    for (let i = 0; i < series * years; i++) out[i] = marginal.fromScore(normQuantile(rng.uniform()));
  } else {
    const rho = correlation.rho;
    const innov = Math.sqrt(1 - rho * rho);
    for (let s = 0; s < series; s++) {
      let z = normQuantile(rng.uniform());
      out[s * years] = marginal.fromScore(z);
      for (let t = 1; t < years; t++) {
        z = rho * z + innov * normQuantile(rng.uniform());
        out[s * years + t] = marginal.fromScore(z);
      }
    }
  }
  return out;
}
