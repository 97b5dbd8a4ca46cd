import { normCdf, normSf } from "../special.js";
import { type Family, positive } from "./types.js";

/** Lognormal given by the `mean` and `sd` of the lifetime itself (not of its logarithm). */
export const lognormal: Family = {
  name: "lognormal",
  paramSets: [["mean", "sd"]],
  create(p) {
    const mean = positive(p, "mean");
    const sd = positive(p, "sd");
    const s2 = Math.log1p((sd * sd) / (mean * mean));
    const s = Math.sqrt(s2);
    const mu = Math.log(mean) - s2 / 2;
    return {
      family: "lognormal", params: { mean, sd },
      sf: (x) => (x <= 0 ? 1 : normSf((Math.log(x) - mu) / s)),
      cdf: (x) => (x <= 0 ? 0 : normCdf((Math.log(x) - mu) / s)),
      mean, belowZero: 0,
    };
  },
};
