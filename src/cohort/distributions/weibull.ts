import { bisect, lnGamma } from "../special.js";
import { type Family, ParamError, positive } from "./types.js";

/** Weibull: `shape` k and `scale` λ, or `mean` and `sd` (moment-matched: k from the coefficient of variation). */
export const weibull: Family = {
  name: "weibull",
  paramSets: [["shape", "scale"], ["mean", "sd"]],
  create(p) {
    let k: number;
    let lam: number;
    if ("shape" in p) {
      k = positive(p, "shape");
      lam = positive(p, "scale");
    } else {
      const m = positive(p, "mean");
      const sd = positive(p, "sd");
      const cv2 = (sd / m) ** 2;
      // cv²(k) = Γ(1 + 2/k) / Γ(1 + 1/k)² − 1, decreasing in k.
      const f = (lk: number) => {
        const kk = Math.exp(lk);
        return Math.exp(lnGamma(1 + 2 / kk) - 2 * lnGamma(1 + 1 / kk)) - 1 - cv2;
      };
      if (f(Math.log(0.02)) < 0 || f(Math.log(500)) > 0) throw new ParamError("sd", `no Weibull has mean ${m} and sd ${sd}`);
      k = Math.exp(bisect(f, Math.log(0.02), Math.log(500)));
      lam = m / Math.exp(lnGamma(1 + 1 / k));
    }
    return {
      family: "weibull", params: { ...p },
      sf: (x) => (x <= 0 ? 1 : Math.exp(-Math.pow(x / lam, k))),
      cdf: (x) => (x <= 0 ? 0 : -Math.expm1(-Math.pow(x / lam, k))),
      mean: lam * Math.exp(lnGamma(1 + 1 / k)),
      belowZero: 0,
    };
  },
};
