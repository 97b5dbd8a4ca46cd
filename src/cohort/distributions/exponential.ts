import { type Family, positive } from "./types.js";

/** Exponential (first-order decay): memoryless; solved without cohorts by the exact recurrence. */
export const exponential: Family = {
  name: "exponential",
  paramSets: [["mean"]],
  create(p) {
    const mean = positive(p, "mean");
    return {
      family: "exponential", params: { mean },
      sf: (x) => (x <= 0 ? 1 : Math.exp(-x / mean)),
      cdf: (x) => (x <= 0 ? 0 : -Math.expm1(-x / mean)),
      mean, belowZero: 0,
    };
  },
};
