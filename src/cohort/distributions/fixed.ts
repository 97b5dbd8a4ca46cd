import { type Family, ParamError } from "./types.js";

/** Every item leaves at exactly age `mean` (by the midpoint rule: in year c + a, a − ½ < L ≤ a + ½). */
export const fixed: Family = {
  name: "fixed",
  paramSets: [["mean"]],
  create(p) {
    const L = p.mean;
    if (L === undefined || !Number.isFinite(L) || L < 0) throw new ParamError("mean", `mean must be a finite number ≥ 0 (got ${L})`);
    return { family: "fixed", params: { mean: L }, sf: (x) => (x < L ? 1 : 0), cdf: (x) => (x < L ? 0 : 1), mean: L, belowZero: 0 };
  },
};
