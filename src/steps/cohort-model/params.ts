/**
 * The small tables of a cohort model: lifetimes, curves and content. Their rows are read once,
 * checked with file and line (before any step runs), and matched to series and cohorts
 * (ops/param-match.ts). Each lifetimes row's curve is computed once.
 */
import { DataError } from "../../errors.js";
import type { Session } from "../../engine/session.js";
import { ident } from "../../engine/sql.js";
import { ALL_PARAMS, curveOf, makeLifetime, type Curve } from "../../cohort/index.js";
import type { MatchRow } from "../../ops/param-match.js";
import { duplicateKeys, invertedRanges, locatedRelation, raise, rowsWhere, type Problem } from "../../ops/config-table.js";
import type { PlanContext, StepContext } from "../types.js";
import { CONTENT_COLUMNS, LIFETIME_KEYS, type O } from "./options.js";
import { LIFETIME_SPREAD_COLUMNS } from "./uncertainty-options.js";

export interface ParamRow extends MatchRow {
  raw: Record<string, unknown>;
}

export const LIFETIME_COLUMNS = [...LIFETIME_KEYS, ...ALL_PARAMS, ...LIFETIME_SPREAD_COLUMNS];

/** Plan-time: a parameter table's columns are series keys and the accepted names only. */
export function checkParamColumns(ctx: PlanContext, o: O, table: string, option: string, accepted: readonly string[], required: readonly string[]): void {
  const cols = ctx.schemaOf(table, option).columns.map((c) => c.name);
  const unknown = cols.filter((c) => !o.keys.includes(c) && !accepted.includes(c) && c !== "unit");
  if (unknown.length) ctx.fail(option, `table ${table} has unknown column(s) ${unknown.join(", ")}; accepted: the series keys (${o.keys.join(", ")}) and ${accepted.join(", ")}`);
  const missing = required.filter((c) => !cols.includes(c));
  if (missing.length) ctx.fail(option, `table ${table} lacks column(s) ${missing.join(", ")}`);
}

const num = (x: unknown) => (x === null || x === undefined || x === "" ? null : Number(x));

export async function paramRows(s: Session, table: string, keys: readonly string[]): Promise<{ rows: ParamRow[]; keyCols: string[] }> {
  const cols = (await s.columns(table)).map((c) => c.name);
  const keyCols = cols.filter((c) => keys.includes(c));
  const data = await s.all(`SELECT * FROM ${ident(table)}`);
  const rows = data.map((r, index) => {
    const k: Record<string, string> = {};
    for (const c of keyCols) {
      const v = r[c];
      if (v !== null && v !== undefined && String(v) !== "") k[c] = String(v);
    }
    return { index, keys: k, first: num(r.first_cohort), last: num(r.last_cohort), specificity: Object.keys(k).length, raw: r };
  });
  return { rows, keyCols };
}

export type CurveTable = Map<string, { ages: number[]; survival: number[] }>;

export async function curveTable(s: Session, table: string | undefined): Promise<CurveTable> {
  const out: CurveTable = new Map();
  if (!table) return out;
  for (const r of await s.all(`SELECT CAST(curve AS VARCHAR) AS curve, age, survival FROM ${ident(table)} ORDER BY curve, age`)) {
    const e = out.get(String(r.curve)) ?? { ages: [], survival: [] };
    e.ages.push(Number(r.age));
    e.survival.push(Number(r.survival));
    out.set(String(r.curve), e);
  }
  return out;
}

/** Curves per lifetimes row, computed once each, to a length that may grow (then recomputed). */
export class CurveCache {
  private readonly byRow = new Map<number, Curve>();
  constructor(private readonly o: O, private readonly curves: CurveTable, public length: number) {}

  grow(length: number): void {
    if (length > this.length) {
      this.length = length;
      this.byRow.clear();
    }
  }

  of(row: ParamRow, where: string): Curve {
    let c = this.byRow.get(row.index);
    if (!c) {
      const r = row.raw;
      let lt;
      try {
        lt = makeLifetime({
          distribution: String(r.distribution ?? ""), mean: num(r.mean), sd: num(r.sd), shape: num(r.shape), scale: num(r.scale),
          curve: r.curve === null || r.curve === undefined || r.curve === "" ? null : String(r.curve),
        }, `${where}: lifetimes row ${row.index + 1}`, (name) => this.curves.get(name));
      } catch (e) {
        throw new DataError(`step ${this.o.id}: ${(e as Error).message}`);
      }
      c = curveOf(lt, this.length);
      this.byRow.set(row.index, c);
    }
    return c;
  }

  used(): [number, Curve][] {
    return [...this.byRow.entries()].sort((x, y) => x[0] - y[0]);
  }
}

/** Checks of the lifetimes, curves and content tables with file and line, before any step runs. */
export async function checkParamTables(ctx: StepContext, o: O): Promise<void> {
  const s = ctx.session;
  const curves = o.curves && ctx.tables.has(o.curves) ? o.curves : undefined;
  if (curves) {
    const p: Problem[] = [];
    p.push(...(await rowsWhere(ctx, curves, `curve IS NULL OR age IS NULL OR survival IS NULL`, `'curve, age and survival must all be given'`)));
    p.push(...(await rowsWhere(ctx, curves, `age < 0 OR age <> round(age)`, `'age ' || age || ' of curve ' || curve || '; accepted: a whole number ≥ 0'`)));
    p.push(...(await rowsWhere(ctx, curves, `NOT (survival >= 0 AND survival <= 1)`, `'survival ' || survival || ' of curve ' || curve || ' at age ' || age || '; accepted: 0 to 1'`)));
    raise(o.id, `curves table ${curves} has invalid values`, p);
    raise(o.id, `curves table ${curves} has duplicate rows`, await duplicateKeys(ctx, curves, ["curve", "age"]));
  }
  if (ctx.tables.has(o.lifetimes)) {
    const cols = await ctx.columnsOf(o.lifetimes);
    const keyCols = cols.filter((c) => o.keys.includes(c));
    if (cols.includes("first_cohort") && cols.includes("last_cohort")) raise(o.id, `lifetimes table ${o.lifetimes} has an inverted cohort range`, await invertedRanges(ctx, o.lifetimes, "first_cohort", "last_cohort"));
    raise(o.id, `lifetimes table ${o.lifetimes}: two rows give the same series and cohorts (so neither would win)`,
      await duplicateKeys(ctx, o.lifetimes, keyCols, { first: cols.includes("first_cohort") ? "first_cohort" : null, last: cols.includes("last_cohort") ? "last_cohort" : null }));
    // Every row must make a valid lifetime (distribution name, parameter set and values).
    const table = curves ? await curveTable(s, curves) : (new Map() as CurveTable);
    const rel = await locatedRelation(ctx, o.lifetimes);
    const rows = await s.all(`SELECT * FROM ${rel}`);
    const problems: Problem[] = [];
    for (const r of rows) {
      const has = (c: string) => cols.includes(c);
      try {
        if (String(r.distribution ?? "") === "table" && !curves && o.curves) continue; // the curves come from a step: checked when it runs
        makeLifetime({
          distribution: String(r.distribution ?? ""), mean: has("mean") ? num(r.mean) : null, sd: has("sd") ? num(r.sd) : null,
          shape: has("shape") ? num(r.shape) : null, scale: has("scale") ? num(r.scale) : null,
          curve: has("curve") && r.curve !== null && r.curve !== "" ? String(r.curve) : null,
        }, String(r.__where), (name) => table.get(name));
      } catch (e) {
        problems.push({ where: String(r.__where), message: (e as Error).message.slice(String(r.__where).length + 2) });
      }
    }
    raise(o.id, `lifetimes table ${o.lifetimes} has invalid rows`, problems);
  }
  if (o.content && ctx.tables.has(o.content)) {
    const cols = await ctx.columnsOf(o.content);
    const keyCols = cols.filter((c) => o.keys.includes(c));
    raise(o.id, `content table ${o.content} has invalid values`, await rowsWhere(ctx, o.content, `material IS NULL OR content IS NULL OR NOT isfinite(CAST(content AS DOUBLE)) OR content < 0`,
      `'material ' || coalesce(CAST(material AS VARCHAR), '(empty)') || ', content ' || coalesce(CAST(content AS VARCHAR), '(empty)') || '; accepted: a material name and a finite content ≥ 0'`));
    if (cols.includes("first_cohort") && cols.includes("last_cohort")) raise(o.id, `content table ${o.content} has an inverted cohort range`, await invertedRanges(ctx, o.content, "first_cohort", "last_cohort"));
    raise(o.id, `content table ${o.content}: two rows give the same series, material and cohorts`,
      await duplicateKeys(ctx, o.content, [...keyCols, "material"], { first: cols.includes("first_cohort") ? "first_cohort" : null, last: cols.includes("last_cohort") ? "last_cohort" : null }));
  }
}

export { CONTENT_COLUMNS };
