/** From a lifetimes-table row (distribution name + parameters) to a Lifetime, with clear errors. */
import { ALL_PARAMS, DISTRIBUTION_NAMES, family, ParamError, tableLifetime, type Lifetime } from "./distributions/index.js";

export interface LifetimeParams {
  distribution: string;
  mean?: number | null;
  sd?: number | null;
  shape?: number | null;
  scale?: number | null;
  curve?: string | null;
}

export type CurveLookup = (name: string) => { ages: number[]; survival: number[] } | undefined;

/** Builds a lifetime; `where` names the row or series in error messages. */
export function makeLifetime(row: LifetimeParams, where: string, curves?: CurveLookup): Lifetime {
  const name = row.distribution;
  const given = ALL_PARAMS.filter((p) => row[p] !== null && row[p] !== undefined && !(typeof row[p] === "number" && Number.isNaN(row[p] as number) && false));
  if (name === "table") {
    const surplus = given.filter((p) => p !== "curve");
    if (!row.curve) throw new Error(`${where}: distribution table needs parameter curve (the name of a curve in the curves table)`);
    if (surplus.length) throw new Error(`${where}: distribution table takes only curve; surplus parameter(s) ${surplus.join(", ")}`);
    const c = curves?.(row.curve);
    if (!c) throw new Error(`${where}: curve ${JSON.stringify(row.curve)} not found in the curves table`);
    try {
      return tableLifetime(row.curve, c.ages, c.survival);
    } catch (e) {
      throw new Error(`${where}: parameter ${(e as ParamError).param ?? "curve"}: ${(e as Error).message}`);
    }
  }
  const fam = family(name);
  if (!fam) {
    const near = nearestName(name, DISTRIBUTION_NAMES);
    throw new Error(`${where}: unknown distribution ${JSON.stringify(name)}${near ? `; did you mean ${JSON.stringify(near)}?` : ""} (accepted: ${DISTRIBUTION_NAMES.join(", ")})`);
  }
  const set = fam.paramSets.find((ps) => ps.every((p) => given.includes(p as never)) && given.every((g) => ps.includes(g)));
  if (!set) {
    const options = fam.paramSets.map((ps) => ps.join(" and ")).join(", or ");
    const best = fam.paramSets.find((ps) => ps.some((p) => given.includes(p as never))) ?? fam.paramSets[0]!;
    const missing = best.filter((p) => !given.includes(p as never));
    const surplus = given.filter((g) => !best.includes(g));
    throw new Error(`${where}: distribution ${name} takes ${options}; ${[missing.length ? `missing ${missing.join(", ")}` : "", surplus.length ? `surplus ${surplus.join(", ")}` : ""].filter(Boolean).join("; ")}`);
  }
  const p: Record<string, number> = {};
  for (const k of set) {
    const v = row[k as keyof LifetimeParams] as number;
    if (typeof v !== "number" || Number.isNaN(v)) throw new Error(`${where}: parameter ${k} must be a number (got ${v})`);
    p[k] = v;
  }
  try {
    return fam.create(p);
  } catch (e) {
    if (e instanceof ParamError) throw new Error(`${where}: parameter ${e.param}: ${e.message}`);
    throw e;
  }
}

/** The closest name by edit distance, when close enough to be a likely typo. */
export function nearestName(word: string, names: readonly string[]): string | undefined {
  const w = word.toLowerCase();
  let best: string | undefined;
  let bestD = Infinity;
  for (const c of names) {
    const d = editDistance(w, c.toLowerCase());
    if (d < bestD) [best, bestD] = [c, d];
  }
  return best !== undefined && bestD <= Math.max(2, Math.floor(word.length / 3)) ? best : undefined;
}

function editDistance(a: string, b: string): number {
  let prev = Array.from({ length: b.length + 1 }, (_, j) => j);
  for (let i = 1; i <= a.length; i++) {
    const cur = [i];
    for (let j = 1; j <= b.length; j++) cur[j] = Math.min(prev[j]! + 1, cur[j - 1]! + 1, prev[j - 1]! + (a[i - 1] === b[j - 1] ? 0 : 1));
    prev = cur;
  }
  return prev[b.length]!;
}
