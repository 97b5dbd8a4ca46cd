/**
 * Revisions against the previous release: for every published table, each figure that moved
 * (keys, year, variable, previous and new value, absolute and relative revision) with its
 * cause: `new` or `dropped` keys; `input` (source rows behind that key and year changed: the
 * sources are named); `method` (the step's options or the small tables that configure it or an
 * earlier step changed: lifetimes, content, concordance, …); `input+method`; or `unexplained`
 * (neither: a sign of a non-deterministic step). Per source, an input-change table lists the
 * rows added, removed and changed, with old and new values; it needs the previous release's
 * copy of its inputs (`inputs/<source>.parquet`, kept in every release).
 *
 * Matching a changed source row to a figure: the key columns the two share by name (region,
 * product, …) must be equal, and the source row's year must not be after the figure's year (a
 * change reaches later years through stocks); a source without a year matches every year.
 */
import { existsSync } from "node:fs";
import path from "node:path";
import { ident, idents, keyMap, lit } from "../engine/sql.js";
import type { Session } from "../engine/session.js";
import type { Plan } from "../plan/build.js";
import type { NodePrint } from "../plan/fingerprint.js";
import type { PreviousRun } from "../run/reuse.js";
import type { AuditLog } from "../audit/log.js";
import type { TableSchema } from "../steps/types.js";

/** Relative changes smaller than this are rounding, not revisions. */
export const SAME = 1e-12;

const NUMERIC = /^(DOUBLE|FLOAT|REAL|DECIMAL.*|HUGEINT|BIGINT|INTEGER|SMALLINT|TINYINT)$/;

/** The prefix of the input-change and revision tables' names. */
export const changesTable = (source: string) => `__changes_${source}`;
export const revisionsTable = (table: string) => `__revisions_${table}`;

/** A source's rows as kept in the release (for the next one's input changes). */
export async function keepInputs(s: Session, source: string, staging: string): Promise<string> {
  const file = path.join(staging, "inputs", `${source}.parquet`);
  await s.run(`COPY (SELECT * FROM ${ident(source)}) TO ${lit(file)} (FORMAT parquet, COMPRESSION zstd, ROW_GROUP_SIZE 122880)`);
  return file;
}

/**
 * Input changes of a source against the previous release's copy: one row per changed value
 * (keys, change = changed, column, old, new) and per added or removed row (change = added or
 * removed, old or new = the row's other values as text). Returns the number of change rows, or
 * null when the previous release kept no copy.
 */
export async function inputChanges(s: Session, source: string, schema: TableSchema, prev: PreviousRun): Promise<number | null> {
  const old = path.join(prev.dir, "inputs", `${source}.parquet`);
  if (!existsSync(old)) return null;
  const t = ident(changesTable(source));
  const cols = schema.columns.map((c) => c.name);
  // Without declared keys (a lifetimes table, say), rows are compared whole: removed and added.
  const keys = schema.keys.length ? schema.keys : cols;
  const vals = cols.filter((c) => !keys.includes(c));
  const nv = (v: string) => ident(`__n_${v}`);
  const ov = (v: string) => ident(`__o_${v}`);
  const rowText = (col: (v: string) => string) => vals.length ? `concat_ws(', ', ${vals.map((v) => `${lit(v + "=")} || coalesce(CAST(${col(v)} AS VARCHAR), '')`).join(", ")})` : "''";
  const join = keys.map((c) => `n.${ident(c)} IS NOT DISTINCT FROM o.${ident(c)}`).join(" AND ") || "TRUE";
  const jcols = [...keys.map((c) => `coalesce(n.${ident(c)}, o.${ident(c)}) AS ${ident(c)}`), ...vals.flatMap((v) => [`n.${ident(v)} AS ${nv(v)}`, `o.${ident(v)} AS ${ov(v)}`]), "n.__n", "o.__o"];
  const k = idents(keys);
  const parts = [
    `SELECT ${k}, 'added' AS change, NULL AS "column", NULL AS old, ${rowText(nv)} AS new FROM j WHERE __o IS NULL`,
    `SELECT ${k}, 'removed', NULL, ${rowText(ov)}, NULL FROM j WHERE __n IS NULL`,
    ...vals.map((v) => `SELECT ${k}, 'changed', ${lit(v)}, CAST(${ov(v)} AS VARCHAR), CAST(${nv(v)} AS VARCHAR) FROM j
      WHERE __n IS NOT NULL AND __o IS NOT NULL AND ${nv(v)} IS DISTINCT FROM ${ov(v)}`),
  ];
  await s.run(`CREATE OR REPLACE TABLE ${t} AS WITH j AS (SELECT ${jcols.join(", ")} FROM (SELECT *, TRUE AS __n FROM ${ident(source)}) n
      FULL OUTER JOIN (SELECT *, TRUE AS __o FROM read_parquet(${lit(old)})) o ON ${join})
    SELECT * FROM (${parts.join(" UNION ALL ")}) ORDER BY ALL`);
  return Number(await s.scalar(`SELECT count(*) FROM ${t}`));
}

export interface RevisionRequest {
  table: string;
  step: string;
  schema: TableSchema;
  /** The previous release's files of the table. */
  previousFiles: string[];
  /** Did the options of the step (or of one before it) change? Then every figure's method changed. */
  methodChanged: boolean;
  /** Small configuring tables upstream that changed (lifetimes, content, …): figures their changed rows reach changed method. */
  changedConfig?: { name: string; schema: TableSchema }[];
  /** Data sources upstream that changed, with their change tables and schemas. */
  changedSources: { name: string; schema: TableSchema; hasChanges: boolean }[];
  /** Without row-level changes (comparing two run directories): sources known changed from the manifests, named on every changed figure. */
  coarseSources?: string[];
  /** Tables loaded in the session (for the groups tables of grouped keys). */
  tables?: Set<string>;
}

/** The revisions table of one published table; returns its row count. */
export async function revisions(s: Session, r: RevisionRequest): Promise<number> {
  const keys = r.schema.keys.filter((k) => r.schema.columns.some((c) => c.name === k));
  const vals = r.schema.columns.filter((c) => !keys.includes(c.name) && (c.type === "DOUBLE" || c.type === "FLOAT")).map((c) => c.name);
  const t = ident(revisionsTable(r.table));
  const join = keys.map((k) => `n.${ident(k)} IS NOT DISTINCT FROM p.${ident(k)}`).join(" AND ") || "TRUE";
  const nv = (v: string) => ident(`__n_${v}`);
  const pv = (v: string) => ident(`__p_${v}`);
  const jcols = [...keys.map((k) => `coalesce(n.${ident(k)}, p.${ident(k)}) AS ${ident(k)}`), ...vals.flatMap((v) => [`n.${ident(v)} AS ${nv(v)}`, `p.${ident(v)} AS ${pv(v)}`]), "n.__n", "p.__p"];
  if (!vals.length || !keys.length) {
    await s.run(`CREATE OR REPLACE TABLE ${t} AS SELECT ${keys.length ? keys.map((k) => `CAST(NULL AS VARCHAR) AS ${ident(k)}`).join(", ") + "," : ""} CAST(NULL AS VARCHAR) AS variable,
      CAST(NULL AS DOUBLE) AS previous, CAST(NULL AS DOUBLE) AS new, CAST(NULL AS DOUBLE) AS revision, CAST(NULL AS DOUBLE) AS relative_revision,
      CAST(NULL AS VARCHAR) AS cause, CAST(NULL AS VARCHAR) AS sources WHERE FALSE`);
    return 0;
  }
  const diff = vals.map((v) => `SELECT ${idents(keys)}, ${lit(v)} AS variable, CAST(${pv(v)} AS DOUBLE) AS previous, CAST(${nv(v)} AS DOUBLE) AS new,
      __n IS NULL AS __dropped, __p IS NULL AS __new
    FROM j WHERE __n IS NULL OR __p IS NULL OR (${pv(v)} IS DISTINCT FROM ${nv(v)}
      AND (${pv(v)} IS NULL OR ${nv(v)} IS NULL OR abs(${nv(v)} - ${pv(v)}) > ${SAME} * greatest(abs(${nv(v)}), abs(${pv(v)}))))`);
  // A changed source row explains a figure when their shared keys agree and its year is not later.
  const explains = r.changedSources.filter((c) => c.hasChanges).map((c) => {
    const shared = c.schema.columns.map((x) => x.name).filter((x) => keys.includes(x) && x !== "year");
    const yearCond = c.schema.columns.some((x) => x.name === "year") && keys.includes("year") ? "c.year <= d.year" : "TRUE";
    const cond = [yearCond, ...shared.map((k) => {
      // A key that holds groups of the source's values (an aggregate's regions → world) matches through its groups table.
      const g = r.schema.columns.find((x) => x.name === k)?.groups;
      if (!g) return `CAST(c.${ident(k)} AS VARCHAR) = CAST(d.${ident(k)} AS VARCHAR)`;
      if (!r.tables?.has(g.table)) return "TRUE"; // the groups table is not at hand: any value of this key may be reached
      return `EXISTS (SELECT 1 FROM ${ident(g.table)} g WHERE CAST(g.${ident(g.group)} AS VARCHAR) = CAST(d.${ident(k)} AS VARCHAR) AND CAST(g.${ident(g.member)} AS VARCHAR) = CAST(c.${ident(k)} AS VARCHAR))`;
    })].join(" AND ");
    return `CASE WHEN EXISTS (SELECT 1 FROM ${ident(changesTable(c.name))} c WHERE ${cond}) THEN ${lit(c.name)} END`;
  });
  // A changed configuring row (a lifetime of one product, say) reaches the figures whose shared keys agree.
  const configHits = (r.changedConfig ?? []).map((c) => {
    const shared = c.schema.columns.map((x) => x.name).filter((x) => keys.includes(x) && x !== "year");
    const cond = shared.length ? shared.map((k) => `c.${ident(k)} IS NULL OR CAST(c.${ident(k)} AS VARCHAR) = CAST(d.${ident(k)} AS VARCHAR)`).map((x) => `(${x})`).join(" AND ") : "TRUE";
    return `EXISTS (SELECT 1 FROM ${ident(changesTable(c.name))} c WHERE ${cond})`;
  });
  const method = r.methodChanged ? "TRUE" : configHits.length ? `(${configHits.join(" OR ")})` : "FALSE";
  const srcList = explains.length ? `list_filter([${explains.join(", ")}], x -> x IS NOT NULL)`
    : r.coarseSources?.length ? `[${r.coarseSources.map(lit).join(", ")}]` : "CAST([] AS VARCHAR[])";
  await s.run(`CREATE OR REPLACE TABLE ${t} AS
    WITH j AS (SELECT ${jcols.join(", ")} FROM (SELECT *, TRUE AS __n FROM ${ident(r.table)}) n
      FULL OUTER JOIN (SELECT *, TRUE AS __p FROM read_parquet([${r.previousFiles.map(lit).join(", ")}])) p ON ${join}),
    d AS (${diff.join(" UNION ALL ")}),
    e AS (SELECT d.*, ${srcList} AS __src, ${method} AS __method FROM d)
    SELECT ${idents(keys)}, variable, previous, new, new - previous AS revision,
      CASE WHEN previous IS NULL OR new IS NULL OR previous = 0 THEN NULL ELSE (new - previous) / abs(previous) END AS relative_revision,
      CASE WHEN __new THEN 'new' WHEN __dropped THEN 'dropped'
        WHEN len(__src) > 0 AND __method THEN 'input+method' WHEN len(__src) > 0 THEN 'input'
        WHEN __method THEN 'method' ELSE 'unexplained' END AS cause,
      CASE WHEN len(__src) > 0 AND NOT __new AND NOT __dropped THEN array_to_string(__src, ', ') END AS sources
    FROM e ORDER BY ${idents(keys)}, variable`);
  return Number(await s.scalar(`SELECT count(*) FROM ${t}`));
}

/** The revision audit: past years' figures revised by more than the threshold must be explained. */
export async function revisionAudit(audits: AuditLog, table: string, step: string, schema: TableSchema, newestYear: number | null, threshold: number, severity: "error" | "warning"): Promise<void> {
  const keys = schema.keys.filter((k) => k !== "year");
  const hasYear = schema.keys.includes("year");
  await audits.check({
    step, check: `revision:${table}`, severity, unit: "1",
    items: `SELECT ${keyMap([...keys, "variable"])} AS keys, ${hasYear ? "year" : "NULL"} AS year, coalesce(abs(relative_revision), 0) AS observed, 0.0 AS expected, ${threshold} AS tolerance,
        ${lit(`${table}: `)} || variable || ' revised from ' || coalesce(printf('%.10g', previous), 'nothing') || ' to ' || coalesce(printf('%.10g', new), 'nothing') ||
        ' (' || coalesce(printf('%+.2f', 100 * relative_revision) || ' %', cause) || '), cause ' || cause || coalesce(' (' || sources || ')', '') ||
        ' — a revision of a past year beyond ' || ${lit(String(100 * threshold))} || ' %: explain it in the release notes' AS message
      FROM ${ident(revisionsTable(table))} WHERE cause NOT IN ('new', 'dropped') ${hasYear && newestYear !== null ? `AND year < ${newestYear}` : ""}`,
    failWhen: "observed > tolerance",
    failMessage: "revision beyond the threshold",
  });
}
