/**
 * Spreads: the declarative description of how an uncertain quantity varies around its central
 * value (one small options object per family, validated by zod), and their resolution into a
 * concrete Marginal for a given central value c.
 *
 * Three forms, told apart by which parameters are given:
 *   multiplicative  rel_sd / rel_half_width: the quantity is c·F, where the factor F has mean 1
 *                   and does not depend on c (`factorMarginal` gives F itself, to draw one factor
 *                   and apply it to many central values). A zero central value stays zero.
 *   absolute        sd / half_width, in the quantity's units: for normal, uniform and triangular
 *                   the quantity is c + E with E of mean 0 (additive); for the lognormal, whose
 *                   shape cannot be shifted, the quantity is lognormal with mean c and that sd.
 *   fixed           min / max (uniform) or min / mode / max (triangular): the distribution is
 *                   given outright and c is not used.
 * The central value is the mean in every form except two: a truncated normal (`truncate_below`)
 * is centred on c before truncation, which moves its mean up (exact mean: Marginal.mean); and a
 * fixed spread ignores c.
 *
 * Relative half-widths are at most 1 so that a factor never turns negative.
 * Errors: bad options throw PipelineError naming the option, the value and what is accepted;
 * a central value a spread cannot take (e.g. a negative one for a lognormal) throws DataError.
 */
import { z } from "zod";
import { DataError, PipelineError } from "../errors.js";
import {
  lognormalMarginal,
  normalMarginal,
  pointMarginal,
  triangularMarginal,
  truncatedNormalMarginal,
  uniformMarginal,
  type Marginal,
} from "./marginals.js";

const nonNegative = (what: string) => z.number({ error: `${what} must be a number` }).min(0, { error: `${what} must be ≥ 0` });
const share = (what: string) =>
  z
    .number({ error: `${what} must be a number` })
    .min(0, { error: `${what} must be between 0 and 1` })
    .max(1, { error: `${what} must be between 0 and 1 (a larger relative half-width would make the factor negative)` });
const value = (what: string) => z.number({ error: `${what} must be a finite number` });

export const NormalSpread = z
  .object({
    family: z.literal("normal"),
    rel_sd: nonNegative("rel_sd").optional().describe("standard deviation as a share of the central value (multiplicative: central × a factor of mean 1)"),
    sd: nonNegative("sd").optional().describe("standard deviation in the quantity's units (absolute: central + an error of mean 0)"),
    truncate_below: value("truncate_below")
      .optional()
      .describe("lower limit in the quantity's units (e.g. 0 for a quantity that must stay non-negative); the normal centred on the central value is cut there, which raises its mean"),
  })
  .strict()
  .describe("normal spread: give rel_sd or sd");

export const LognormalSpread = z
  .object({
    family: z.literal("lognormal"),
    rel_sd: nonNegative("rel_sd").optional().describe("standard deviation of the quantity as a share of its mean (the central value); not of its logarithm"),
    sd: nonNegative("sd").optional().describe("standard deviation of the quantity in its units; the mean is the central value"),
  })
  .strict()
  .describe("lognormal spread (mean = the central value, which must be positive): give rel_sd or sd");

export const UniformSpread = z
  .object({
    family: z.literal("uniform"),
    rel_half_width: share("rel_half_width").optional().describe("half-width as a share of the central value: from c·(1 − h) to c·(1 + h)"),
    half_width: nonNegative("half_width").optional().describe("half-width in the quantity's units: from c − w to c + w"),
    min: value("min").optional().describe("lowest value (fixed spread, with max; the central value is not used)"),
    max: value("max").optional().describe("highest value (fixed spread, with min)"),
  })
  .strict()
  .describe("uniform spread: give rel_half_width, or half_width, or min and max");

export const TriangularSpread = z
  .object({
    family: z.literal("triangular"),
    rel_half_width: share("rel_half_width").optional().describe("half-width as a share of the central value, symmetric, mode at the central value"),
    half_width: nonNegative("half_width").optional().describe("half-width in the quantity's units, symmetric, mode at the central value"),
    min: value("min").optional().describe("lowest value (fixed spread, with mode and max)"),
    mode: value("mode").optional().describe("most likely value (fixed spread)"),
    max: value("max").optional().describe("highest value (fixed spread)"),
  })
  .strict()
  .describe("triangular spread: give rel_half_width, or half_width, or min, mode and max");

const FAMILIES = { normal: NormalSpread, lognormal: LognormalSpread, uniform: UniformSpread, triangular: TriangularSpread } as const;
export const SPREAD_FAMILIES = Object.keys(FAMILIES) as (keyof typeof FAMILIES)[];

/** The parameter sets each family accepts (exactly one set must be given in full). */
const PARAM_SETS: Record<keyof typeof FAMILIES, string[][]> = {
  normal: [["rel_sd"], ["sd"]],
  lognormal: [["rel_sd"], ["sd"]],
  uniform: [["rel_half_width"], ["half_width"], ["min", "max"]],
  triangular: [["rel_half_width"], ["half_width"], ["min", "mode", "max"]],
};
const SET_PARAMS = new Set(Object.values(PARAM_SETS).flat(2));

function checkCombination(s: Record<string, unknown>): string | undefined {
  const fam = s.family as keyof typeof FAMILIES;
  const given = Object.keys(s).filter((k) => SET_PARAMS.has(k) && s[k] !== undefined);
  const sets = PARAM_SETS[fam];
  const accepted = sets.map((set) => set.join(" and ")).join(", or ");
  const got = given.length ? given.map((k) => `${k} = ${JSON.stringify(s[k])}`).join(", ") : "none of them";
  if (!sets.some((set) => set.length === given.length && set.every((p) => given.includes(p)))) {
    return `a ${fam} spread takes ${accepted}; got ${got}`;
  }
  const { min, mode, max } = s as { min?: number; mode?: number; max?: number };
  if (min !== undefined && max !== undefined && !(min < max)) return `min must be below max; got min = ${min}, max = ${max}`;
  if (mode !== undefined && min !== undefined && max !== undefined && !(mode >= min && mode <= max)) {
    return `mode must lie between min and max; got min = ${min}, mode = ${mode}, max = ${max}`;
  }
  return undefined;
}

export const Spread = z
  .discriminatedUnion("family", [NormalSpread, LognormalSpread, UniformSpread, TriangularSpread])
  .superRefine((s, ctx) => {
    const problem = checkCombination(s as Record<string, unknown>);
    if (problem) ctx.addIssue({ code: "custom", message: problem, path: [] });
  })
  .describe("how an uncertain quantity spreads around its central value");

export type Spread = z.infer<typeof Spread>;
export type SpreadForm = "multiplicative" | "absolute" | "fixed";

function valueAt(input: unknown, path: readonly PropertyKey[]): unknown {
  let v: unknown = input;
  for (const k of path) v = v !== null && typeof v === "object" ? (v as Record<PropertyKey, unknown>)[k] : undefined;
  return v;
}

/** Validates spread options; `where` names them in messages (e.g. "uncertainty.inflow"). */
export function parseSpread(input: unknown, where = "spread"): Spread {
  const r = Spread.safeParse(input);
  if (r.success) return r.data;
  const family = valueAt(input, ["family"]);
  const lines = r.error.issues.map((issue) => {
    const at = [where, ...issue.path.map(String)].join(".");
    if (issue.code === "unrecognized_keys") {
      const shape = FAMILIES[family as keyof typeof FAMILIES]?.shape;
      return `${at}: unknown option(s) ${issue.keys.join(", ")} for a ${String(family)} spread; accepted: ${Object.keys(shape ?? {}).join(", ")}`;
    }
    if (issue.code === "invalid_union" || (issue.path.length === 1 && issue.path[0] === "family")) {
      if (family === undefined) return `${where}: a spread needs a family; accepted: ${SPREAD_FAMILIES.join(", ")}; got ${JSON.stringify(input)}`;
      return `${at}: unknown spread family ${JSON.stringify(family)}; accepted: ${SPREAD_FAMILIES.join(", ")}`;
    }
    if (issue.code === "custom") return `${at}: ${issue.message}`;
    return `${at}: ${issue.message}; got ${JSON.stringify(valueAt(input, issue.path))}`;
  });
  throw new PipelineError(lines.join("\n"));
}

export function spreadForm(s: Spread): SpreadForm {
  if ("rel_sd" in s && s.rel_sd !== undefined) return "multiplicative";
  if ("rel_half_width" in s && s.rel_half_width !== undefined) return "multiplicative";
  if ("sd" in s && s.sd !== undefined) return "absolute";
  if ("half_width" in s && s.half_width !== undefined) return "absolute";
  return "fixed";
}

/** The distribution of the quantity whose central value is `central`. */
export function resolveSpread(s: Spread, central: number, where = "spread"): Marginal {
  if (!Number.isFinite(central)) throw new DataError(`${where}: the central value must be a finite number (got ${central})`);
  const c = central;
  const absC = Math.abs(c);
  switch (s.family) {
    case "normal": {
      const sd = s.rel_sd !== undefined ? s.rel_sd * absC : s.sd!;
      if (s.truncate_below === undefined) return normalMarginal(c, sd);
      if (sd === 0) {
        if (c < s.truncate_below) throw new DataError(`${where}: central value ${c} with no spread lies below truncate_below = ${s.truncate_below}; accepted: a central value ≥ ${s.truncate_below}, or a spread > 0`);
        return pointMarginal(c);
      }
      try {
        return truncatedNormalMarginal(c, sd, s.truncate_below);
      } catch (e) {
        throw new DataError(`${where}: ${(e as Error).message}`);
      }
    }
    case "lognormal": {
      if (s.rel_sd !== undefined && c === 0) return pointMarginal(0);
      if (!(c > 0)) throw new DataError(`${where}: a lognormal spread needs a positive central value (got ${c}); accepted: central > 0 (a zero one with rel_sd), or a normal, uniform or triangular spread`);
      return lognormalMarginal(c, s.rel_sd !== undefined ? s.rel_sd * c : s.sd!);
    }
    case "uniform": {
      if (s.min !== undefined) return uniformMarginal(s.min, s.max!);
      const w = s.rel_half_width !== undefined ? s.rel_half_width * absC : s.half_width!;
      return uniformMarginal(c - w, c + w);
    }
    case "triangular": {
      if (s.min !== undefined) return triangularMarginal(s.min, s.mode!, s.max!);
      const w = s.rel_half_width !== undefined ? s.rel_half_width * absC : s.half_width!;
      return triangularMarginal(c - w, c, c + w);
    }
  }
}

/**
 * The factor F of a multiplicative spread (mean 1 unless truncated): the quantity is c·F for any
 * c > 0. Truncation is accepted only at 0, the one limit that is the same for every c > 0.
 */
export function factorMarginal(s: Spread, where = "spread"): Marginal {
  if (spreadForm(s) !== "multiplicative") {
    throw new PipelineError(`${where}: a factor needs a multiplicative spread (rel_sd or rel_half_width); got a ${spreadForm(s)} ${s.family} spread`);
  }
  if (s.family === "normal" && s.truncate_below !== undefined && s.truncate_below !== 0) {
    throw new PipelineError(`${where}: a factor can be truncated only at 0 (a limit in the quantity's units differs per central value); got truncate_below = ${s.truncate_below}`);
  }
  return resolveSpread(s, 1, where);
}
