import { normCdf, normSf } from "../special.js";
import { type Family, positive } from "./types.js";

/** Normal lifetime; its mass below age 0 leaves in the year of entry (and is audited). */
export const normal: Family = {
  name: "normal",
  paramSets: [["mean", "sd"]],
  create(p) {
    const mean = positive(p, "mean");
    const sd = positive(p, "sd");
    return {
      family: "normal", params: { mean, sd },
      sf: (x) => normSf((x - mean) / sd),
      cdf: (x) => normCdf((x - mean) / sd),
      mean, belowZero: normCdf(-mean / sd),
    };
  },
};
