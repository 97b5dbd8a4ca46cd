import { normCdf, normPdf, normSf } from "../special.js";
import { type Family, positive } from "./types.js";

/** Normal with the parent's `mean` and `sd`, renormalised over positive ages. */
export const truncatedNormal: Family = {
  name: "truncated-normal",
  paramSets: [["mean", "sd"]],
  create(p) {
    const mu = positive(p, "mean");
    const sd = positive(p, "sd");
    const z0 = normSf(-mu / sd); // P(parent > 0)
    const alpha = -mu / sd;
    return {
      family: "truncated-normal", params: { mean: mu, sd },
      sf: (x) => (x <= 0 ? 1 : normSf((x - mu) / sd) / z0),
      cdf: (x) => (x <= 0 ? 0 : (normCdf((x - mu) / sd) - normCdf(alpha)) / z0),
      mean: mu + (sd * normPdf(alpha)) / z0,
      belowZero: 0,
    };
  },
};
