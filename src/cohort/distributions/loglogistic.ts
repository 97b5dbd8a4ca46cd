import { bisect } from "../special.js";
import { type Family, ParamError, positive } from "./types.js";

/**
 * Log-logistic: `shape` β and `scale` α (F(x) = 1 / (1 + (x/α)^−β)), or `mean` and `sd`
 * (moment-matched; the mean is finite for β > 1 and the sd for β > 2).
 */
export const loglogistic: Family = {
  name: "loglogistic",
  paramSets: [["shape", "scale"], ["mean", "sd"]],
  create(p) {
    let beta: number;
    let alpha: number;
    if ("shape" in p) {
      beta = positive(p, "shape");
      alpha = positive(p, "scale");
    } else {
      const m = positive(p, "mean");
      const sd = positive(p, "sd");
      const cv2 = (sd / m) ** 2;
      // With b = π/β: E[X] = α b / sin b, E[X²] = α² 2b / sin 2b; cv² = (2b/sin 2b)/(b/sin b)² − 1, valid for β > 2.
      const f = (lb: number) => {
        const be = Math.exp(lb);
        const b = Math.PI / be;
        return ((2 * b) / Math.sin(2 * b)) / ((b / Math.sin(b)) ** 2) - 1 - cv2;
      };
      const lo = Math.log(2 + 1e-9);
      const hi = Math.log(1e4);
      if (!(f(lo) > 0) || f(hi) > 0) {
        throw new ParamError("sd", `no log-logistic has mean ${m} and sd ${sd} (its sd is finite only for shape > 2)`);
      }
      beta = Math.exp(bisect(f, lo, hi));
      const b = Math.PI / beta;
      alpha = m / (b / Math.sin(b));
    }
    const b = Math.PI / beta;
    return {
      family: "loglogistic", params: { ...p },
      sf: (x) => (x <= 0 ? 1 : 1 / (1 + Math.pow(x / alpha, beta))),
      cdf: (x) => (x <= 0 ? 0 : 1 / (1 + Math.pow(x / alpha, -beta))),
      mean: beta > 1 ? (alpha * b) / Math.sin(b) : Infinity,
      belowZero: 0,
    };
  },
};
