/**
 * The concordance's partial sums (the `__parts` table of applyConcordance) from
 * native/concsum.c, for long input (one value per row, named by a kind column): every input row
 * is taken once, on DuckDB's threads, and added into dense cells per group keys, concordance
 * keys, year and kind, walking its commodity's concordance rows in arrays; no joined row is
 * ever made. The sums are exact integers, so the table holds the values the SQL gives (tests:
 * tests/ops/concordance-native.test.ts). At the L bench set (1.3 × 10^8 flows, 2.6 × 10^8
 * joined rows) DuckDB's join and grouping took 21 s here.
 *
 * Returns false, having changed nothing, where it does not apply: no native library,
 * time-varying concordance rows, more than one flag, NULL keys, a non-integer year, more cells
 * than MAX_CELLS, or a value the SQL would fail on (then the SQL runs and reports it).
 */
import { ident, idents, lit } from "../engine/sql.js";
import { nativeReader, scanArrays, uniqueView } from "../engine/handoff.js";
import type { StepContext } from "../steps/types.js";
import type duckdb from "@duckdb/node-bindings";

/** Cells (group keys × concordance keys × years × kinds) up to which the dense sums are used (104 bytes each per thread). */
const MAX_CELLS = 1_000_000;

/** How many times the native sums were used in this process (for tests and profiles). */
export const nativePartsUsed = { count: 0 };

export interface NativePartsRequest {
  step: string;
  /** The input (long flows): group keys, commodity, year, the kind column, … */
  input: string;
  /** The input in mass, with reason, __cid, __kind, __value, __units, __nomass and the flag (a view over input ⨝ um). */
  massed: string;
  groupKeys: string[];
  /** Output keys that come from the concordance (e.g. product, material). */
  extraKeys: string[];
  /** The column order of the parts table's keys. */
  fine: string[];
  values: string[];
  flag: string | null;
  /** Concordance rows: commodity, extra keys, factor, share, __first. */
  conc: string;
  /** Unit masses per commodity, with __cid. */
  um: string;
  parts: string;
}

export async function nativeParts(ctx: StepContext, r: NativePartsRequest): Promise<boolean> {
  const nat = nativeReader();
  if (!nat?.concordanceSums) return false;
  const s = ctx.session;
  const g = r.groupKeys;
  const gd = ident(`__gd_${r.step}`);
  const ckd = ident(`__ckd_${r.step}`);
  const cells = ident(`__cells_${r.step}`);
  const cleanup = () => s.run(`DROP TABLE IF EXISTS ${gd}; DROP TABLE IF EXISTS ${ckd}; DROP TABLE IF EXISTS ${cells}`);
  const yearType = String((await s.one(`SELECT column_type FROM (DESCRIBE SELECT year FROM ${ident(r.input)})`)).column_type);
  if (!/^(TINYINT|SMALLINT|INTEGER|BIGINT|UTINYINT|USMALLINT|UINTEGER)$/.test(yearType)) return false;
  // Group-key tuples of the input with their year span (one scan), and concordance-key tuples.
  const order = g.length ? `ORDER BY ${idents(g)}` : "";
  await s.run(`CREATE OR REPLACE TABLE ${gd} AS SELECT *, CAST(row_number() OVER (${order}) - 1 AS INTEGER) AS __gid FROM (
      SELECT ${g.map((k) => `${ident(k)}, `).join("")}min(year) AS __y0, max(year) AS __y1, count(*) - count(year) AS __yn FROM ${ident(r.input)} ${g.length ? `GROUP BY ${idents(g)}` : ""})`);
  const e = r.extraKeys;
  await s.run(`CREATE OR REPLACE TABLE ${ckd} AS SELECT *, CAST(row_number() OVER (${e.length ? `ORDER BY ${idents(e)}` : ""}) - 1 AS INTEGER) AS __ckid FROM (
      SELECT DISTINCT ${e.length ? idents(e) : "0 AS __none"} FROM ${ident(r.conc)})`);
  const st = await s.one(`SELECT count(*) AS n, min(__y0) AS y0, max(__y1) AS y1, coalesce(sum(__yn), 0) AS yn,
      ${g.length ? g.map((k) => `count(*) - count(${ident(k)})`).join(" + ") : "0"} AS gnull,
      (SELECT count(*) FROM ${ckd}) AS ck, (SELECT ${e.length ? e.map((k) => `count(*) - count(${ident(k)})`).join(" + ") : "0"} FROM ${ckd}) AS cknull,
      (SELECT count(*) FROM ${ident(r.um)}) AS ncom FROM ${gd}`);
  const G = Number(st.n), CK = Number(st.ck), NC = Number(st.ncom), K = r.values.length;
  const y0 = Number(st.y0), Y = Number(st.y1) - y0 + 1;
  if (G === 0 || Number(st.yn) > 0 || Number(st.gnull) > 0 || Number(st.cknull) > 0 || G * (CK + 1) * Y * K > MAX_CELLS) {
    await cleanup();
    return false;
  }
  // The concordance rows in arrays, by commodity id.
  const rows = await s.all(`SELECT u.__cid AS cid, k.__ckid AS ck, c.factor AS f, c.share AS sh, c.__first AS first
    FROM ${ident(r.conc)} c JOIN ${ident(r.um)} u ON u.commodity IS NOT DISTINCT FROM c.commodity
    JOIN ${ckd} k ON ${e.length ? e.map((k) => `k.${ident(k)} IS NOT DISTINCT FROM c.${ident(k)}`).join(" AND ") : "TRUE"} ORDER BY u.__cid`);
  const cstart = new Int32Array(NC + 1);
  for (const x of rows) cstart[Number(x.cid) + 1]!++;
  for (let c = 0; c < NC; c++) cstart[c + 1]! += cstart[c]!;
  const ck = Int32Array.from(rows, (x) => Number(x.ck));
  const factor = Float64Array.from(rows, (x) => Number(x.f));
  const share = Float64Array.from(rows, (x) => Number(x.sh));
  const first = Int32Array.from(rows, (x) => (x.first ? 1 : 0));
  const kind = `CASE m.__kind ${r.values.map((v, i) => `WHEN ${lit(v)} THEN ${i}`).join(" ")} END`;
  const sql = `SELECT gd.__gid, CASE WHEN m.reason IS NULL THEN m.__cid END, CAST(m.year - ${y0} AS INTEGER), ${kind}, m.__value, m.__units, m.__nomass,
      ${r.flag ? `m.${ident(r.flag)}` : "CAST(NULL AS BOOLEAN)"}
    FROM ${ident(r.massed)} m JOIN ${gd} gd ON ${g.length ? g.map((k) => `gd.${ident(k)} = m.${ident(k)}`).join(" AND ") : "TRUE"}`;
  const db = (s.instance as unknown as { db: duckdb.Database }).db;
  const res = await nat.concordanceSums(db, sql, [G, CK, Y, K, NC, ctx.exact.scale], cstart, ck, factor, share, first);
  if (res.invalid > 0) {
    await cleanup();
    return false;
  }
  // The cells into DuckDB (in place), then keys back from the dictionaries.
  const n = res.cells;
  const ints = (c: number) => res.ints.subarray(c * n, (c + 1) * n);
  const sums = (c: number) => res.sums.subarray(c * n, (c + 1) * n);
  const names = ["gid", "ck", "y", "kind", "anym", "flag", "m", "d", "i", "u", "mapped", "unmapped"];
  await s.run(`CREATE OR REPLACE TABLE ${cells} (${names.map((c, j) => `${c} ${j < 6 ? "INTEGER" : "BIGINT"}`).join(", ")})`);
  if (n > 0) {
    const view = uniqueView("__cairn_cells");
    await scanArrays(s, view, `INSERT INTO ${cells} SELECT ${names.map((_, j) => `c${j}`).join(", ")} FROM ${view}`,
      names.map((_, j) => `c${j}`), [...[0, 1, 2, 3, 4, 5].map(ints), ...[0, 1, 2, 3, 4, 5].map(sums)], n);
  }
  const key = (k: string) => (g.includes(k) ? `gd.${ident(k)}` : `k.${ident(k)}`);
  await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(r.parts)} AS
    SELECT ${r.fine.map((k) => `${key(k)} AS ${ident(k)}, `).join("")}CAST(${y0} + p.y AS ${yearType}) AS year, [${r.values.map(lit).join(", ")}][p.kind + 1] AS __kind,
      CASE WHEN p.anym = 1 THEN CAST(p.m AS HUGEINT) END AS __m, CASE WHEN p.mapped > 0 THEN CAST(p.d AS HUGEINT) END AS __d,
      CAST(p.i AS HUGEINT) AS __i, CAST(p.u AS HUGEINT) AS __u,
      ${r.flag ? `CASE WHEN p.flag >= 0 THEN p.flag = 1 END AS ${ident(r.flag)}, ` : ""}p.mapped AS __mapped_rows, p.unmapped AS __unmapped_rows
    FROM ${cells} p JOIN ${gd} gd ON gd.__gid = p.gid LEFT JOIN ${ckd} k ON k.__ckid = p.ck`);
  await cleanup();
  nativePartsUsed.count++;
  return true;
}
