/**
 * Charts with many series, lumped in DuckDB. A chart keeps at most `max` series: when its rows
 * hold more, the `max` − 1 largest (by the sum of |value| over the chart's rows, as `lumpSeries`
 * ranks them) are kept and the others summed into one "other (n)" series, in SQL, so that
 * JavaScript receives only the kept series' rows and the others' sums. With `max` series or fewer
 * the rows come as they are, and `lumpSeries` (the JavaScript fallback) leaves them unchanged.
 */
import { ident, lit } from "../engine/sql.js";
import type { RunReader } from "./data.js";

export interface ChartRowsOptions {
  /** Value columns: summed over the lumped series (each |value| counts in the ranking). */
  values: string[];
  /** Order of the rows: columns of the data, `series` among them (the others' sum sorts where the first series it holds would). */
  order: string[];
  /** Models that continue others (phases of the data): the rows `join` (charts.ts) draws twice count twice in the ranking. */
  links?: { from: string | undefined; to: string }[];
  /** Series kept (the largest `max` − 1 and "other (n)" when there are more). */
  max: number;
}

export interface ChartRows {
  /** The rows: the data's columns, in its order. */
  rows: Record<string, unknown>[];
  /** Whether series were lumped into "other (n)". */
  lumped: boolean;
  /** The name a series sorts by: the others' sum takes the place of the smallest name it holds. */
  sortKey: (series: string) => string;
}

/**
 * A chart's rows from `data` (a query with a VARCHAR column `series`, the columns of `order`, the
 * `values`, one row per series and the other columns): read in one statement, which counts the
 * series, ranks them by the sum of |value| over every value column of every row (as lumpSeries
 * does over rows that carry one value each; ties by name), and returns every row when there are
 * `max` series or fewer, else the kept series' rows and the others' sums per the other columns.
 */
export async function chartRows(r: RunReader, data: string, o: ChartRowsOptions): Promise<ChartRows> {
  const cols = (await r.all(`SELECT column_name FROM (DESCRIBE ${data})`)).map((x) => String(x.column_name));
  const w = o.values.map((v) => `abs(coalesce(${ident(v)}, 0))`).join(" + ");
  const weights = [`SELECT series, ${w} AS w FROM d`, ...joinWeights("d", o.links ?? [], w)].join(" UNION ALL ");
  const max = Math.max(1, Math.min(o.max, Number.MAX_SAFE_INTEGER));
  const pick = (c: string) =>
    c === "series" ? "CASE WHEN kp.series IS NOT NULL THEN d.series ELSE pl.other END AS series"
      : o.values.includes(c) ? `fsum(d.${ident(c)}) AS ${ident(c)}` : `d.${ident(c)}`;
  // Compensated sums (fsum): the same totals, to the last bit in practice, whatever order DuckDB's
  // threads add the rows in; a sum of one value is that value, so unlumped rows are read as they are.
  const rows = await r.all(`WITH d AS MATERIALIZED (${data}),
    ws AS (SELECT series, fsum(w) AS m FROM (${weights}) WHERE series IS NOT NULL GROUP BY series),
    rk AS (SELECT series, row_number() OVER (ORDER BY m DESC, series) AS rk, count(*) OVER () AS n FROM ws),
    kp AS (SELECT series FROM rk WHERE n <= ${max} OR rk < ${max}),
    pl AS (SELECT 'other (' || (count(*) - ${max - 1}) || ')' AS other, min(series) FILTER (WHERE rk >= ${max}) AS other_at FROM rk)
    SELECT ${cols.map(pick).join(", ")}, CASE WHEN kp.series IS NOT NULL THEN d.series ELSE pl.other_at END AS __sort, kp.series IS NULL AS __other
    FROM d LEFT JOIN kp ON d.series = kp.series CROSS JOIN pl
    GROUP BY ALL ORDER BY ${o.order.map((c) => (c === "series" ? "__sort" : ident(c))).join(", ")}`);
  const sort = new Map<string, string>();
  let lumped = false;
  for (const x of rows) {
    sort.set(String(x.series), String(x.__sort));
    if (x.__other) lumped = true;
    delete x.__sort;
    delete x.__other;
  }
  return { rows, lumped, sortKey: (s) => sort.get(s) ?? s };
}

/**
 * The rows `join` (charts.ts) draws twice, as weights: for each model that continues another, the
 * continued model's rows of its last year before the continuing model starts. `w` is the weight
 * of a row of `rel` (columns series, phase, year).
 */
export function joinWeights(rel: string, links: { from: string | undefined; to: string }[], w: string): string[] {
  return links.filter((l) => l.from !== undefined).map((l) => `SELECT series, ${w} AS w FROM ${rel} WHERE phase = ${lit(l.from!)} AND year =
    (SELECT max(year) FROM ${rel} WHERE phase = ${lit(l.from!)} AND year < (SELECT min(year) FROM ${rel} WHERE phase = ${lit(l.to)}))`);
}
