/** A lifetime distribution family: one file per family, registered in index.ts. */

export interface Lifetime {
  family: string;
  /** Parameters as given. */
  params: Record<string, number>;
  /** Survival S(x) = P(lifetime > x), computed from the survival function itself. */
  sf(x: number): number;
  /** CDF F(x) = P(lifetime ≤ x), computed directly (accurate where F is small). */
  cdf(x: number): number;
  /** The distribution's true mean lifetime. */
  mean: number;
  /** Probability mass below age 0 (only the normal family has any; it leaves in the year of entry). */
  belowZero: number;
  /** For empirical curves: σ(a) given directly by age. */
  sigmaAt?(a: number): number;
}

export interface Family {
  name: string;
  /** Accepted parameter sets, e.g. [["shape", "scale"], ["mean", "sd"]]. */
  paramSets: string[][];
  /** Builds the distribution; throws ParamError for invalid values. */
  create(p: Record<string, number>): Lifetime;
}

export class ParamError extends Error {
  constructor(
    readonly param: string,
    message: string,
  ) {
    super(message);
  }
}

export function positive(p: Record<string, number>, name: string): number {
  const v = p[name];
  if (v === undefined || !Number.isFinite(v) || v <= 0) {
    throw new ParamError(name, `${name} must be a finite number > 0 (got ${v === undefined ? "nothing" : v})`);
  }
  return v;
}
