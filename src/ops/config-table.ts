/**
 * Checks of the small tables that configure steps (concordance, content, lifetimes, curves,
 * groups, anchors): every problem names the file and line (or the table and row), the key and
 * the value, and what is accepted. They run before any step does, in `check` and in `run`.
 */
import { DataError } from "../errors.js";
import { ident, idents, lit } from "../engine/sql.js";
import { locatedView } from "../sources/load.js";
import type { StepContext } from "../steps/types.js";

/** How many problems one message lists before "and N more". */
const SHOWN = 8;

/**
 * A relation over `table` with a `__where` column: "file:line N" for a source loaded with
 * locations, "table T, row N" otherwise (step outputs).
 */
export async function locatedRelation(ctx: StepContext, table: string): Promise<string> {
  const located = locatedView(table);
  const exists = Number(await ctx.session.scalar(`SELECT count(*) FROM duckdb_views() WHERE view_name = ${lit(located)}`)) > 0;
  if (exists) return `(SELECT *, __file || ', ' || __line_kind || ' ' || __line AS __where FROM ${ident(located)})`;
  return `(SELECT *, ${lit(`table ${table}, row `)} || row_number() OVER () AS __where FROM ${ident(table)})`;
}

export interface Problem {
  where: string;
  message: string;
}

/** Throws one DataError listing the problems (the first few, and how many more). */
export function raise(step: string, what: string, problems: Problem[]): void {
  if (!problems.length) return;
  const shown = problems.slice(0, SHOWN).map((p) => `  ${p.where}: ${p.message}`);
  const more = problems.length > SHOWN ? `\n  … and ${problems.length - SHOWN} more` : "";
  throw new DataError(`step ${step}: ${what}:\n${shown.join("\n")}${more}`);
}

/** Rows matching a SQL condition (over the table's columns), each with a message expression. */
export async function rowsWhere(ctx: StepContext, table: string, cond: string, message: string): Promise<Problem[]> {
  const rel = await locatedRelation(ctx, table);
  const rows = await ctx.session.all(`SELECT __where AS w, ${message} AS m FROM ${rel} WHERE ${cond} LIMIT ${SHOWN + 1}`);
  return rows.map((r) => ({ where: String(r.w), message: String(r.m) }));
}

/**
 * Rows sharing a key (all key columns equal, NULL equal to NULL), and, when `range` is given
 * (first and last column names, NULL = open-ended), only rows whose ranges overlap.
 */
export async function duplicateKeys(ctx: StepContext, table: string, keys: string[], range?: { first: string | null; last: string | null }): Promise<Problem[]> {
  const col = (alias: string, c: string | null) => (c ? `${alias}.${ident(c)}` : "NULL");
  const rel = await locatedRelation(ctx, table);
  const keyText = keys.length
    ? keys.map((k) => `${lit(k + "=")} || coalesce(CAST(a.${ident(k)} AS VARCHAR), '(empty)')`).join(` || ', ' || `)
    : lit("(no key columns)");
  const same = keys.length ? keys.map((k) => `a.${ident(k)} IS NOT DISTINCT FROM b.${ident(k)}`).join(" AND ") : "TRUE";
  const overlap = range
    ? ` AND coalesce(${col("a", range.first)}, -2147483648) <= coalesce(${col("b", range.last)}, 2147483647)
        AND coalesce(${col("b", range.first)}, -2147483648) <= coalesce(${col("a", range.last)}, 2147483647)`
    : "";
  const rangeText = range
    ? ` || ' (' || coalesce(CAST(${col("a", range.first)} AS VARCHAR), 'open') || '..' || coalesce(CAST(${col("a", range.last)} AS VARCHAR), 'open')
        || ' overlaps ' || coalesce(CAST(${col("b", range.first)} AS VARCHAR), 'open') || '..' || coalesce(CAST(${col("b", range.last)} AS VARCHAR), 'open') || ')'`
    : "";
  const rows = await ctx.session.all(`WITH r AS (SELECT *, row_number() OVER () AS __n FROM ${rel})
    SELECT a.__where AS w, b.__where AS w2, ${keyText}${rangeText} AS k FROM r a JOIN r b ON a.__n < b.__n AND ${same}${overlap}
    ORDER BY a.__n, b.__n LIMIT ${SHOWN + 1}`);
  return rows.map((r) => ({
    where: `${r.w} and ${r.w2}`,
    message: `${range ? "overlapping rows for one key" : "duplicate key"}: ${r.k}`,
  }));
}

/** A range whose first lies after its last. */
export async function invertedRanges(ctx: StepContext, table: string, first: string, last: string): Promise<Problem[]> {
  return rowsWhere(ctx, table, `${ident(first)} IS NOT NULL AND ${ident(last)} IS NOT NULL AND ${ident(first)} > ${ident(last)}`,
    `${lit(`${first} `)} || ${ident(first)} || ${lit(` is after ${last} `)} || ${ident(last)}`);
}

/** The columns of `table` among `names`. */
export async function presentColumns(ctx: StepContext, table: string, names: readonly string[]): Promise<string[]> {
  const cols = await ctx.columnsOf(table);
  return names.filter((n) => cols.includes(n));
}

export { idents };
