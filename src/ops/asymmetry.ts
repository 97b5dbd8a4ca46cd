/**
 * Trade asymmetry: where both sides report a flow (imports reported by the importer from an
 * exporter, and that exporter's exports to the importer, per commodity and year), the two
 * figures are compared. Items: one per pair of reports, observed = imports, expected = exports,
 * both exact sums of the rows in whole resolution units (engine/sql.ts, Exact.units).
 *
 * Two ways to find the pairs, with the same items:
 * - by sorting (the usual case): every report gets one BIGINT key, numbered from dictionaries
 *   of the region and commodity codes (exact: no hashing), times 2, plus 1 for imports; sorted
 *   by that key, an import follows the export of the same pair. The keys are sorted outside
 *   DuckDB (native/keysort.c) where the native library is built, else by DuckDB's window sort;
 *   at 10^8 reports without pairs 6–7 s, 16–24 s and 48 s for the grouping (README,
 *   "Performance").
 *   This holds only while no two reports share pair and flow; they are counted in the same
 *   pass, and if there are any, or a key is NULL, or the year is not an integer type, or the
 *   numbered key could overflow, the pairs are found
 * - by grouping on the text keys, with sums per group (any number of reports per pair).
 */
import { ident, lit, type Exact } from "../engine/sql.js";
import type { Session } from "../engine/session.js";
import { sortedKeyPairs } from "../engine/handoff.js";

export interface AsymmetryInput {
  /** View or table with reporter, partner, commodity, flow ('import' | 'export'), year, quantity, mirrored. */
  trade: string;
  /** Prefix of the helper tables (dropped by `cleanup`). */
  prefix: string;
  threshold: number;
  /** Exact sums at the run's resolution. */
  exact: Exact;
}

export interface AsymmetryItems {
  /** Items query for the audit log (keys, year, observed, expected, tolerance, message). */
  items: string;
  /** Which way the pairs were found ("sorted keys" or "grouped text keys"). */
  path: "sorted keys" | "grouped text keys";
  cleanup: () => Promise<void>;
}

/** The audit items from pairs `p` (importer, exporter, commodity, year, m = imports, x = exports). */
const itemsOf = (threshold: number) => `SELECT MAP(['importer', 'exporter', 'commodity'], [importer, exporter, commodity]) AS keys, year,
      m AS observed, x AS expected, ${threshold} * greatest(abs(m), abs(x)) AS tolerance,
      'imports reported by ' || importer || ' from ' || exporter || ' (' || printf('%.10g', m) || ') differ from the exports reported by ' || exporter || ' (' || printf('%.10g', x) || ') by more than ' || ${lit(String(threshold * 100))} || ' %' AS message
    FROM p`;

/** The general way: one group per (importer, exporter, commodity, year), any number of reports in each. */
export function groupedItems(a: AsymmetryInput): string {
  return `WITH p AS (
      SELECT importer, exporter, commodity, year,
        ${a.exact.total("CASE WHEN flow = 'import' THEN __units END")} AS m, ${a.exact.total("CASE WHEN flow = 'export' THEN __units END")} AS x
      FROM (SELECT CASE WHEN flow = 'import' THEN reporter ELSE partner END AS importer, CASE WHEN flow = 'import' THEN partner ELSE reporter END AS exporter,
              CAST(commodity AS VARCHAR) AS commodity, year, flow, ${a.exact.units("quantity")} AS __units
            FROM ${ident(a.trade)} WHERE NOT mirrored)
      GROUP BY importer, exporter, commodity, year HAVING bool_or(flow = 'import') AND bool_or(flow = 'export'))
    ${itemsOf(a.threshold)}`;
}

/**
 * Finds the pairs by sorting numbered keys when that is exact (see the file comment), else
 * falls back to grouping; `grouped` asks for the grouping (for tests).
 */
export async function asymmetryItems(s: Session, a: AsymmetryInput, grouped = false): Promise<AsymmetryItems> {
  const codes = ident(`${a.prefix}_codes`);
  const coms = ident(`${a.prefix}_coms`);
  const pairs = ident(`${a.prefix}_pairs`);
  const cleanup = async () => s.run(`DROP TABLE IF EXISTS ${codes}; DROP TABLE IF EXISTS ${coms}; DROP TABLE IF EXISTS ${pairs}`);
  const byGrouping = async (): Promise<AsymmetryItems> => {
    await cleanup();
    return { items: groupedItems(a), path: "grouped text keys", cleanup: async () => {} };
  };
  if (grouped) return byGrouping();
  const t = ident(a.trade);
  // Dictionaries of the codes (NULL kept, so that a NULL key sends us to the general way).
  await s.run(`CREATE OR REPLACE TABLE ${codes} AS SELECT code, CAST(row_number() OVER (ORDER BY code) - 1 AS BIGINT) AS id
    FROM (SELECT reporter AS code FROM ${t} UNION SELECT partner FROM ${t})`);
  await s.run(`CREATE OR REPLACE TABLE ${coms} AS SELECT code, CAST(row_number() OVER (ORDER BY code) - 1 AS BIGINT) AS id
    FROM (SELECT DISTINCT CAST(commodity AS VARCHAR) AS code FROM ${t})`);
  const st = await s.one(`SELECT (SELECT count(*) FROM ${codes}) AS r, (SELECT count(*) FILTER (WHERE code IS NULL) FROM ${codes}) AS rn,
      (SELECT count(*) FROM ${coms}) AS c, (SELECT count(*) FILTER (WHERE code IS NULL) FROM ${coms}) AS cn,
      y.y0, y.y1, y.yn FROM (SELECT min(year) AS y0, max(year) AS y1, count(*) - count(year) AS yn FROM ${t}) y`);
  const R = Number(st.r), C = Number(st.c);
  const y0 = st.y0 == null ? 0 : Number(st.y0);
  const Y = st.y1 == null ? 1 : Number(st.y1) - y0 + 1;
  // Keys up to 2·R²·C·Y must stay exact in a BIGINT and in a double (the divisors below are written from doubles).
  const yearType = String((await s.one(`SELECT column_type FROM (DESCRIBE SELECT year FROM ${t})`)).column_type);
  if (Number(st.rn) + Number(st.cn) + Number(st.yn) > 0 || R * C === 0 || 2 * R * R * C * Y >= 2 ** 53 || !/^(TINYINT|SMALLINT|INTEGER|BIGINT|UTINYINT|USMALLINT|UINTEGER)$/.test(yearType)) return byGrouping();
  const key = `((a.id * ${R} + b.id) * ${C} + c.id) * ${Y} + (t.year - ${y0})`;
  // Sorted by 2·key + (1 for imports): a report with the key and flow of the one before it is
  // a second report of the pair and flow (dup); an import after the export of its pair closes a pair.
  const reports = `SELECT 2 * (${key}) + CASE WHEN t.flow = 'import' THEN 1 ELSE 0 END AS k, ${a.exact.units("t.quantity")} AS u
        FROM (SELECT CASE WHEN flow = 'import' THEN reporter ELSE partner END AS importer, CASE WHEN flow = 'import' THEN partner ELSE reporter END AS exporter,
                CAST(commodity AS VARCHAR) AS commodity, year, flow, quantity FROM ${t} WHERE NOT mirrored) t
        JOIN ${codes} a ON a.code = t.importer JOIN ${codes} b ON b.code = t.exporter JOIN ${coms} c ON c.code = t.commodity`;
  // Sorted outside DuckDB where the native library is built (native/keysort.c: 6.2 s for 10^8
  // reports here, against 22.8 s for DuckDB's window sort; its connection sees the dictionaries
  // and the pairs table because they are not TEMP), else by DuckDB.
  await s.run(`CREATE OR REPLACE TABLE ${pairs} (k BIGINT, m_units BIGINT, x_units BIGINT)`);
  const r = await sortedKeyPairs(s, reports, Math.max(2, Math.ceil(Math.log2(2 * R * R * C * Y))), `${a.prefix}_pairs`);
  if (r) {
    if (r.equal + r.nulls + r.outOfRange > 0) return byGrouping();
  } else {
    await s.run(`CREATE OR REPLACE TABLE ${pairs} AS
      SELECT k // 2 AS k, u AS m_units, pu AS x_units, pk = k AS dup FROM (
        SELECT k, u, lag(k) OVER (ORDER BY k) AS pk, lag(u) OVER (ORDER BY k) AS pu FROM (${reports}))
      WHERE pk = k OR (k % 2 = 1 AND pk = k - 1)`);
    if (Number(await s.scalar(`SELECT count(*) FROM ${pairs} WHERE dup`)) > 0) return byGrouping();
  }
  // Keys back to codes by list position (the dictionaries are small); computed for failing items only.
  const m = a.exact.fromUnits("CAST(m_units AS HUGEINT)");
  const x = a.exact.fromUnits("CAST(x_units AS HUGEINT)");
  const items = `WITH p AS (
      SELECT (SELECT list(code ORDER BY id) FROM ${codes})[k // ${Y * C * R} + 1] AS importer,
        (SELECT list(code ORDER BY id) FROM ${codes})[(k // ${Y * C}) % ${R} + 1] AS exporter,
        (SELECT list(code ORDER BY id) FROM ${coms})[(k // ${Y}) % ${C} + 1] AS commodity,
        CAST(k % ${Y} + ${y0} AS BIGINT) AS year, ${m} AS m, ${x} AS x
      FROM ${pairs})
    ${itemsOf(a.threshold)}`;
  return { items, path: "sorted keys", cleanup };
}

