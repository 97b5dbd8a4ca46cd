import { gammaPQ } from "../special.js";
import { type Family, positive } from "./types.js";

/** Gamma: `shape` k and `scale` θ (mean kθ), or `mean` and `sd` (k = (mean/sd)², θ = sd²/mean). */
export const gammaFamily: Family = {
  name: "gamma",
  paramSets: [["shape", "scale"], ["mean", "sd"]],
  create(p) {
    let k: number;
    let th: number;
    if ("shape" in p) {
      k = positive(p, "shape");
      th = positive(p, "scale");
    } else {
      const m = positive(p, "mean");
      const sd = positive(p, "sd");
      k = (m / sd) ** 2;
      th = (sd * sd) / m;
    }
    return {
      family: "gamma", params: { ...p },
      sf: (x) => (x <= 0 ? 1 : gammaPQ(k, x / th).q),
      cdf: (x) => (x <= 0 ? 0 : gammaPQ(k, x / th).p),
      mean: k * th,
      belowZero: 0,
    };
  },
};
