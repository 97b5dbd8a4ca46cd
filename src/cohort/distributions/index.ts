/** Registry of lifetime families: adding a distribution is adding a file and one line here. */
import type { Family } from "./types.js";
import { fixed } from "./fixed.js";
import { normal } from "./normal.js";
import { truncatedNormal } from "./truncated-normal.js";
import { lognormal } from "./lognormal.js";
import { weibull } from "./weibull.js";
import { gammaFamily } from "./gamma.js";
import { exponential } from "./exponential.js";
import { loglogistic } from "./loglogistic.js";

export const FAMILIES: readonly Family[] = [fixed, normal, truncatedNormal, lognormal, weibull, gammaFamily, exponential, loglogistic];
/** Every distribution name accepted in a lifetimes table (`table` reads a curve). */
export const DISTRIBUTION_NAMES = [...FAMILIES.map((f) => f.name), "table"] as const;
export const ALL_PARAMS = ["mean", "sd", "shape", "scale", "curve"] as const;

export function family(name: string): Family | undefined {
  return FAMILIES.find((f) => f.name === name);
}

export * from "./types.js";
export { tableLifetime } from "./table.js";
