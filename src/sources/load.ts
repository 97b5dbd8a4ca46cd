/**
 * Sources: named tables read by DuckDB itself (CSV, Parquet, globs, hive folders), typed and
 * unit-converted in SQL. Rows that break the declared types or constraints go to the rejects
 * table with file, row and reason; nothing is dropped silently.
 */
import { closeSync, existsSync, openSync, readSync, statSync } from "node:fs";
import path from "node:path";
import { DataError, PipelineError, firstLines, resourceFailure } from "../errors.js";
import { InputWatch } from "./verify.js";
import type { Session } from "../engine/session.js";
import { ident, idents, lit } from "../engine/sql.js";
import { sortedKeyCounts } from "../engine/handoff.js";
import type { ColumnSpecT, Pipeline, SourceT } from "../spec/schema.js";
import { acceptedUnits, isMassUnit, PIECE, sqlIsPiece, sqlMassFactorCase, massFactor, isPieceUnit } from "../units.js";

export const REJECTS_TABLE = "__cairn_rejects";

export interface InputFile {
  source: string;
  path: string;
  bytes: number;
  rows: number;
  sha256: string;
}

export interface SourceResult {
  name: string;
  keys: string[];
  rows_read: number;
  rows_rejected: number;
  rows_filtered: number;
  rows_loaded: number;
  /** The newest year in the source, when it has a year column. */
  year_max?: number | null;
  files: InputFile[];
}

interface Col {
  name: string;
  type: "text" | "integer" | "number" | "quantity" | "boolean";
  key: boolean;
  allowNegative: boolean;
  nullable: boolean;
}

export function normaliseColumns(spec: Record<string, ColumnSpecT>): Col[] {
  return Object.entries(spec).map(([name, c]) =>
    typeof c === "string"
      ? { name, type: c, key: false, allowNegative: false, nullable: false }
      : { name, type: c.type, key: c.key ?? false, allowNegative: c.allow_negative ?? false, nullable: (c.nullable ?? false) && !c.key },
  );
}

export function formatOf(src: SourceT, resolved: string): "csv" | "parquet" {
  if (src.format) return src.format;
  const p = resolved.toLowerCase();
  if (/\.(parquet|pq)$/.test(p)) return "parquet";
  if (/\.(csv|tsv|txt)(\.gz)?$/.test(p)) return "csv";
  return "parquet";
}

/** The list of files a source's path names (file, glob or folder). */
export async function sourceFiles(s: Session, name: string, src: SourceT, dir: string): Promise<{ files: string[]; format: "csv" | "parquet" }> {
  const resolved = path.resolve(dir, src.path);
  let pattern = resolved;
  if (existsSync(resolved) && statSync(resolved).isDirectory()) {
    const fmt = src.format ?? "parquet";
    pattern = path.join(resolved, "**", fmt === "csv" ? "*.csv" : "*.parquet");
  }
  const format = formatOf(src, pattern);
  const rows = await s.all(`SELECT file FROM glob(${lit(pattern)}) ORDER BY file`);
  const files = rows.map((r) => String(r.file));
  if (files.length === 0) {
    throw new DataError(`source ${name}: no file matches ${src.path} (resolved to ${pattern})`);
  }
  return { files, format };
}

function csvArgs(src: SourceT, header: boolean): string {
  const c = src.csv ?? { delimiter: ",", header: true, decimal: ".", quote: '"' };
  return [
    "all_varchar = true",
    `header = ${header ? "true" : "false"}`,
    `delim = ${lit(c.delimiter ?? ",")}`,
    `quote = ${lit(c.quote ?? '"')}`,
    `escape = ${lit(c.quote ?? '"')}`,
    "filename = '__file'",
    `hive_partitioning = ${src.hive ? "true" : "false"}`,
  ].join(", ");
}

/**
 * The columns of a CSV source as written in its header (or, without a header, as declared),
 * read here rather than sniffed: DuckDB's sniffer gives up on a whole file for one bad line (an
 * unterminated quote), where a read with the dialect and columns given rejects that line.
 */
export function csvHeader(src: SourceT, files: string[]): string[] {
  const header = src.csv?.header ?? true;
  if (!header) return Object.keys(src.columns);
  const delim = src.csv?.delimiter ?? ",";
  const quote = src.csv?.quote ?? '"';
  const names: string[][] = files.map((f) => {
    const fd = openSync(f, "r");
    const buf = Buffer.alloc(1 << 16);
    let n: number;
    try {
      n = readSync(fd, buf, 0, buf.length, 0);
    } finally {
      closeSync(fd);
    }
    const text = buf.subarray(0, n).toString("utf8").replace(/^\uFEFF/, "");
    const out: string[] = [];
    let cur = "";
    let inQ = false;
    for (let i = 0; i < text.length; i++) {
      const ch = text[i]!;
      if (inQ) {
        if (ch === quote && text[i + 1] === quote) { cur += quote; i++; }
        else if (ch === quote) inQ = false;
        else cur += ch;
      } else if (ch === quote) inQ = true;
      else if (text.startsWith(delim, i)) { out.push(cur.trim()); cur = ""; i += delim.length - 1; }
      else if (ch === "\n" || ch === "\r") break;
      else cur += ch;
    }
    out.push(cur.trim());
    return out;
  });
  const first = names[0]!;
  names.forEach((h, i) => {
    if (h.join("\u0000") !== first.join("\u0000")) {
      throw new DataError(`${files[i]}: its header (${h.join(", ")}) differs from that of ${files[0]} (${first.join(", ")}); the files of one source must have the same columns`);
    }
  });
  return first;
}

function readExpr(src: SourceT, files: string[], format: "csv" | "parquet", extra = ""): string {
  const list = `[${files.map(lit).join(", ")}]`;
  if (format === "parquet") {
    return `read_parquet(${list}, filename = '__file', file_row_number = true, hive_partitioning = ${src.hive ? "true" : "false"}, union_by_name = true)`;
  }
  const header = src.csv?.header ?? true;
  const cols = csvHeader(src, files);
  const seen = new Map<string, number>();
  const unique = cols.map((c) => {
    const k = seen.get(c) ?? 0;
    seen.set(c, k + 1);
    return k ? `${c}_${k}` : c || `column${seen.size - 1}`;
  });
  const columns = `auto_detect = false, columns = {${unique.map((c) => `${lit(c)}: 'VARCHAR'`).join(", ")}}`;
  return `read_csv(${list}, ${csvArgs(src, header)}, ${columns}${extra.replace(/, names = \[[^\]]*\]/, "")})`;
}

/** The columns of the files, before rename, as DuckDB sees them. */
export async function fileColumns(s: Session, src: SourceT, files: string[], format: "csv" | "parquet"): Promise<string[]> {
  const cols = await s.all(`DESCRIBE SELECT * FROM ${readExpr(src, files, format, format === "csv" ? ", ignore_errors = true" : "")}`);
  return cols.map((c) => String(c.column_name)).filter((c) => c !== "__file" && c !== "file_row_number");
}

/** For `check`: a source with no data rows (a header at most) is an error, as in a run, unless allow_empty. */
export async function checkNotEmpty(s: Session, name: string, src: SourceT, files: string[], format: "csv" | "parquet"): Promise<void> {
  if (src.allow_empty) return;
  const rows = await s.all(`SELECT 1 AS x FROM ${readExpr(src, files, format, format === "csv" ? ", ignore_errors = true" : "")} LIMIT 1`);
  if (rows.length === 0) {
    throw new DataError(`source ${name}: ${files.length === 1 ? files[0] : `the ${files.length} files of ${src.path}`} ${files.length === 1 ? "has" : "have"} no data rows (a header at most); give data, or set allow_empty: true on the source if an empty table is expected`);
  }
}

/** Checks that every declared column exists (after rename); returns the rename map file→table. */
export async function checkColumns(s: Session, name: string, src: SourceT, files: string[], format: "csv" | "parquet"): Promise<void> {
  for (const f of files) {
    if (format === "csv" && statSync(f).size === 0) {
      throw new DataError(`source ${name}: ${f}: the file is empty (0 bytes); expected a header line with the columns ${Object.keys(src.columns).join(", ")}`);
    }
  }
  let found: string[];
  try {
    found = await fileColumns(s, src, files, format);
  } catch (e) {
    throw new DataError(`source ${name}: cannot read ${files.length === 1 ? files[0] : `${files.length} files (${files[0]} …)`} as ${format}: ${firstLine(e)}`);
  }
  const renamed = found.map((c) => src.rename?.[c] ?? c);
  const header = src.csv?.header ?? true;
  if (format === "csv" && !header) return; // positional: checked by column count
  const missing = Object.keys(src.columns).filter((c) => !renamed.includes(c));
  if (missing.length > 0) {
    const hints = missing.map((m) => {
      const fileName = Object.entries(src.rename ?? {}).find(([, to]) => to === m)?.[0];
      return fileName ? `${m} (renamed from ${fileName})` : m;
    });
    throw new DataError(
      `source ${name}: ${files.length === 1 ? files[0] : `files ${src.path}`}: declared column(s) ${hints.join(", ")} not found; the file has: ${found.join(", ")}` +
        (src.rename ? "" : " (use rename: to map file columns to table columns)"),
    );
  }
}

function firstLine(e: unknown): string {
  return String((e as Error).message ?? e).split("\n")[0]!;
}

export async function initRejects(s: Session): Promise<void> {
  await s.run(`CREATE OR REPLACE TABLE ${REJECTS_TABLE} (source VARCHAR, file VARCHAR, "row" BIGINT, line BIGINT,
    "column" VARCHAR, value VARCHAR, reason VARCHAR)`);
}

const NUMERIC_TYPES = /^(DOUBLE|FLOAT|REAL|INTEGER|BIGINT|SMALLINT|TINYINT|HUGEINT|UBIGINT|UINTEGER|USMALLINT|UTINYINT|DECIMAL.*)$/;

/**
 * Typed value expression and failure conditions (with reasons) per declared column.
 * `fileType` is the column's type in the file (VARCHAR for CSV).
 */
function columnRules(c: Col, src: SourceT, pipeline: Pipeline, fileType: string): { typed: string; checks: [string, string][] } {
  const raw = ident(c.name);
  const isText = fileType === "VARCHAR";
  const numericFile = NUMERIC_TYPES.test(fileType);
  const txt = isText ? (src.format === "parquet" || fileType === "VARCHAR" && !isCsv(src) ? `NULLIF(${raw}, '')` : `NULLIF(trim(${raw}), '')`) : `CAST(${raw} AS VARCHAR)`;
  const decimal = src.csv?.decimal === "," ? `replace(${txt}, ',', '.')` : txt;
  const checks: [string, string][] = [];
  const missing = c.key ? `missing key ${c.name}` : `missing value in ${c.name}`;
  if (!c.nullable) checks.push([`${isText ? txt : raw} IS NULL`, lit(missing)]);
  let typed: string;
  switch (c.type) {
    case "text":
      typed = txt;
      break;
    case "boolean":
      typed = `TRY_CAST(${txt} AS BOOLEAN)`;
      checks.push([`${txt} IS NOT NULL AND ${typed} IS NULL`, lit(`${c.name} is not a boolean (accepted: true, false)`)]);
      break;
    case "integer": {
      const intFile = /^(INTEGER|BIGINT|SMALLINT|TINYINT|HUGEINT|UBIGINT|UINTEGER|USMALLINT|UTINYINT)$/.test(fileType);
      const d = numericFile ? `CAST(${raw} AS DOUBLE)` : `TRY_CAST(${decimal} AS DOUBLE)`;
      typed = intFile ? `CAST(${raw} AS BIGINT)` : `CAST(${d} AS BIGINT)`;
      if (!intFile) checks.push([`${d} IS NULL AND ${txt} IS NOT NULL OR NOT isfinite(${d}) OR ${d} <> round(${d})`, lit(`${c.name} is not a whole number`)]);
      if (c.name === "year" && pipeline.years) {
        const y = intFile ? raw : d;
        checks.push([`${y} < ${pipeline.years.first} OR ${y} > ${pipeline.years.last}`, lit(`year outside the horizon ${pipeline.years.first}..${pipeline.years.last}`)]);
      }
      break;
    }
    case "number":
    case "quantity": {
      typed = numericFile ? `CAST(${raw} AS DOUBLE)` : `TRY_CAST(${decimal} AS DOUBLE)`;
      if (!numericFile) checks.push([`${txt} IS NOT NULL AND ${typed} IS NULL`, lit(`${c.name} is not a number${src.csv?.decimal === "," ? " (decimal comma expected)" : ""}`)]);
      checks.push([`NOT isfinite(${typed})`, lit(`${c.name} is not finite (NaN or infinite)`)]);
      if (!c.allowNegative) checks.push([`${typed} < 0`, lit(`negative ${c.name} (set allow_negative: true on the column to accept it)`)]);
      break;
    }
  }
  return { typed, checks };
}

function isCsv(src: SourceT): boolean {
  return formatOf(src, src.path) === "csv";
}

function pct(n: number, d: number): string {
  return d === 0 ? "0 %" : `${((100 * n) / d).toFixed(3)} %`;
}

/**
 * One scan of a checked source: rows that fail a check (bad), and hashes of the good rows' key
 * columns shared with another good row (shared; equal keys have equal hashes, so 0 proves the
 * keys unique). The hashes are sorted outside DuckDB where the native library is built
 * (native/keysort.c: 3.5 s for 10^8 trade rows here, against 11.4 s for DuckDB's window sort),
 * else (or beyond the memory limit) by DuckDB.
 */
async function keyHashScan(s: Session, view: string, keyCols: string[]): Promise<{ bad: number; shared: number }> {
  if (keyCols.length === 0) return { bad: Number(await s.scalar(`SELECT count(*) FILTER (WHERE __reason IS NOT NULL) FROM ${ident(view)}`)), shared: 0 };
  const h = `CASE WHEN __reason IS NULL THEN hash(${idents(keyCols)}) END`;
  const r = await sortedKeyCounts(s, `SELECT ${h} FROM ${ident(view)}`);
  if (r) return { bad: r.nulls, shared: r.equal };
  const [scan] = await s.all(`SELECT count(*) FILTER (WHERE h IS NULL) AS bad, count(*) FILTER (WHERE h = p) AS shared
    FROM (SELECT h, lag(h) OVER (ORDER BY h) AS p FROM (SELECT ${h} AS h FROM ${ident(view)}))`);
  return { bad: Number(scan!.bad), shared: Number(scan!.shared) };
}

/** Loads one source as a table (view) of its name; rejected rows into the rejects table. */
export interface LoadOptions {
  log?: (m: string) => void;
  /**
   * Keep each row's file and line (CSV) or row (Parquet) in a view `__located_<name>`, for
   * messages about the small tables that configure steps ("file:line").
   */
  located?: boolean;
  /** Records (hash, size, time) of the files before they are read, for the checks during the run. */
  watch?: InputWatch;
}

/** The view that holds a located source's rows with `__file` and `__line`. */
export const locatedView = (name: string) => `__located_${name}`;

export async function loadSource(s: Session, pipeline: Pipeline, name: string, src: SourceT, dir: string,
  opts: LoadOptions = {}): Promise<SourceResult> {
  const log = opts.log ?? (() => {});
  const { files, format } = await sourceFiles(s, name, src, dir);
  await checkColumns(s, name, src, files, format);
  const hashes = await (opts.watch ?? new InputWatch()).record(name, files);
  // Validation scans the values: DuckDB may otherwise fold a check from a Parquet file's footer
  // statistics (a "min ≥ 0" in the footer would hide negative values) or skip row groups by them.
  await s.run("SET disabled_optimizers = 'statistics_propagation,filter_pushdown'");
  try {
    return await loadChecked();
  } finally {
    await s.run("RESET disabled_optimizers");
  }
  async function loadChecked(): Promise<SourceResult> {
  const cols = normaliseColumns(src.columns);
  const header = src.csv?.header ?? true;
  const csvRejT = `__csvrej_${name}`;
  const csvScanT = `__csvscan_${name}`;
  let checkedT = `__checked_${name}`;
  const checkedView = `__checkedv_${name}`;
  /** For a clean Parquet source: the typed rows without the checks (set by buildChecked). */
  let cleanSelect: string | null = null;

  const names = format === "csv" && !header ? `, names = [${Object.keys(src.columns).map(lit).join(", ")}]` : "";
  const fromExpr = async (numbered: boolean): Promise<{ from: string; types: Map<string, string> }> => {
    let from: string;
    if (format === "csv") {
      from = readExpr(src, files, "csv", `, store_rejects = true, rejects_table = ${lit(csvRejT)}, rejects_scan = ${lit(csvScanT)}${names}${numbered ? ", parallel = false" : ""}`);
    } else from = readExpr(src, files, "parquet");
    const desc = await s.all(`DESCRIBE SELECT * FROM ${readExpr(src, files, format, format === "csv" ? `, ignore_errors = true${names}` : "")}`);
    const types = new Map<string, string>();
    const parts: string[] = [];
    for (const d of desc) {
      const c = String(d.column_name);
      if (c === "__file" || c === "file_row_number") continue;
      const to = src.rename?.[c] ?? c;
      types.set(to, String(d.column_type)); // CSV file columns are VARCHAR (all_varchar); hive folder keys keep their type
      parts.push(`${ident(c)} AS ${ident(to)}`);
    }
    const rowExpr = format === "parquet" ? "file_row_number + 1" : numbered ? "row_number() OVER (PARTITION BY __file)" : "CAST(NULL AS BIGINT)";
    return { from: `(SELECT ${parts.join(", ")}, __file, ${rowExpr} AS __row FROM ${from})`, types };
  };

  // Units.
  let unitTyped: string | null = null;
  let unitFactor = "1";
  const unitChecks: { cond: string; reason: string; column: string }[] = [];
  const hasQty = cols.some((c) => c.type === "quantity");
  if (hasQty) {
    if (src.unit) {
      if (isMassUnit(src.unit)) {
        unitTyped = lit(pipeline.base_unit);
        unitFactor = String(massFactor(src.unit, pipeline.base_unit));
      } else if (isPieceUnit(src.unit)) unitTyped = lit(PIECE);
    } else if (src.unit_column) {
      const u = `trim(CAST(${ident(src.unit_column)} AS VARCHAR))`;
      const mf = sqlMassFactorCase(u, pipeline.base_unit);
      unitTyped = `CASE WHEN ${mf} IS NOT NULL THEN ${lit(pipeline.base_unit)} WHEN ${sqlIsPiece(u)} THEN ${lit(PIECE)} END`;
      unitFactor = `coalesce(${mf}, 1)`;
      unitChecks.push({ cond: `${u} IS NOT NULL AND ${u} <> '' AND ${mf} IS NULL AND NOT ${sqlIsPiece(u)}`, reason: lit(`unknown unit in ${src.unit_column}; accepted: ${acceptedUnits()}`), column: src.unit_column });
    }
  }
  const hasUnitCol = cols.some((c) => c.name === "unit");
  const keyCols = cols.filter((c) => c.key).map((c) => c.name);

  const buildChecked = async (numbered: boolean): Promise<void> => {
    const { from, types } = await fromExpr(numbered);
    const rules = cols.map((c) => ({ c, ...columnRules(c, src, pipeline, types.get(c.name) ?? "VARCHAR") }));
    const allChecks: { cond: string; reason: string; column: string }[] = [];
    for (const r of rules) for (const [cond, reason] of r.checks) allChecks.push({ cond: `coalesce(${cond}, FALSE)`, reason, column: r.c.name });
    for (const u of unitChecks) allChecks.push({ ...u, cond: `coalesce(${u.cond}, FALSE)` });
    // Reasons are only spelled out for rows that fail (one cheap test per row otherwise).
    const anyBad = allChecks.length ? `(${allChecks.map((k) => k.cond).join(" OR ")})` : "FALSE";
    const reasonExpr = allChecks.length ? `CASE WHEN ${anyBad} THEN NULLIF(concat_ws('; ', ${allChecks.map((k) => `CASE WHEN ${k.cond} THEN ${k.reason} END`).join(", ")}), '') END` : "CAST(NULL AS VARCHAR)";
    const firstCol = allChecks.length ? `CASE WHEN ${anyBad} THEN CASE ${allChecks.map((k) => `WHEN ${k.cond} THEN ${lit(k.column)}`).join(" ")} END END` : "CAST(NULL AS VARCHAR)";
    const firstVal = allChecks.length ? `CASE WHEN ${anyBad} THEN CASE ${allChecks.map((k) => `WHEN ${k.cond} THEN CAST(${ident(k.column)} AS VARCHAR)`).join(" ")} END END` : "CAST(NULL AS VARCHAR)";
    const typedSel = rules
      .map((r) => {
        if (hasQty && r.c.name === "unit") return `${unitTyped} AS "unit"`;
        const t = r.c.type === "quantity" && unitFactor !== "1" ? `(${r.typed}) * ${unitFactor}` : r.typed;
        return `${t} AS ${ident(r.c.name)}`;
      })
      .concat(hasQty && !hasUnitCol ? [`${unitTyped} AS unit`] : [])
      .join(", ");
    await s.run(`DROP TABLE IF EXISTS ${ident(csvRejT)}; DROP TABLE IF EXISTS ${ident(csvScanT)}`);
    const select = `SELECT ${typedSel}, __file, __row, ${reasonExpr} AS __reason, ${firstCol} AS __col, ${firstVal} AS __value FROM ${from}`;
    if (format === "parquet") {
      // Parquet is typed and fast to rescan: check it through a view, and keep a view as the
      // source when it is clean (no copy of the data). Only a source with rejects is materialised.
      // One scan counts the failing rows and finds candidate duplicate keys: the good rows'
      // 64-bit hashes of their key columns, sorted, compared with their neighbours (equal keys
      // have equal hashes; sorting 8-byte values is several times faster here than grouping by
      // the keys). Only a hash shared by two good rows, in practice a real duplicate, sends the
      // source to the exact check below.
      await s.run(`CREATE OR REPLACE VIEW ${ident(checkedView)} AS ${select}`);
      const { bad: badRows, shared: sharedHashes } = await keyHashScan(s, checkedView, keyCols);
      if (badRows === 0 && sharedHashes === 0) {
        // Every row passed: the source is the typed projection, without the checks' expressions.
        checkedT = checkedView;
        cleanSelect = `SELECT ${typedSel}, __file, __row FROM ${from}`;
        return;
      }
      checkedT = `__checked_${name}`;
    }
    await s.run(`CREATE OR REPLACE TABLE ${ident(checkedT)} AS ${select}`);
    if (keyCols.length > 0) {
      const dupT = `__dups_${name}`;
      await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(dupT)} AS SELECT ${idents(keyCols)}, count(*) AS n FROM ${ident(checkedT)} WHERE __reason IS NULL GROUP BY ALL HAVING count(*) > 1`);
      if (Number(await s.scalar(`SELECT count(*) FROM ${ident(dupT)}`)) > 0) {
        // The table rewritten with the duplicates marked (an UPDATE of many rows keeps every old
        // version until it commits: 10^6 duplicates of a 21 MB CSV took 1.1 GB that way).
        const dup = `d.n IS NOT NULL AND c.__reason IS NULL`;
        await s.run(`CREATE OR REPLACE TABLE ${ident(checkedT)} AS SELECT c.* REPLACE (
            CASE WHEN ${dup} THEN 'duplicate key (' || ${keyCols.map((k) => `${lit(k + "=")} || CAST(c.${ident(k)} AS VARCHAR)`).join(` || ', ' || `)} || ') occurs ' || d.n || ' times' ELSE c.__reason END AS __reason,
            CASE WHEN ${dup} THEN ${lit(keyCols.join(","))} ELSE c.__col END AS __col,
            CASE WHEN ${dup} THEN concat_ws(',', ${keyCols.map((k) => `CAST(c.${ident(k)} AS VARCHAR)`).join(", ")}) ELSE c.__value END AS __value)
          FROM ${ident(checkedT)} c LEFT JOIN ${ident(dupT)} d ON ${keyCols.map((k) => `c.${ident(k)} = d.${ident(k)}`).join(" AND ")}`);
      }
      await s.run(`DROP TABLE ${ident(dupT)}`);
    }
  };

  log(`source ${name}: reading ${files.length} file(s)`);
  try {
    await buildChecked(Boolean(opts.located) && format === "csv");
  } catch (e) {
    throw resourceFailure(e) ?? new DataError(`source ${name}: cannot read ${files.length === 1 ? files[0] : src.path}: ${firstLines(String((e as Error).message ?? e))}`);
  }
  // A clean Parquet source is a view already checked: no rejects to count again.
  if (cleanSelect) await s.run(`CREATE OR REPLACE VIEW ${ident(checkedView)} AS ${cleanSelect}`);
  let bad = checkedT === checkedView ? 0 : Number(await s.scalar(`SELECT count(*) FROM ${ident(checkedT)} WHERE __reason IS NOT NULL`));
  if (bad > 0 && format === "csv" && !(opts.located)) {
    // Locate rejected rows: a second, ordered read gives each row its number within its file.
    await buildChecked(true);
    bad = Number(await s.scalar(`SELECT count(*) FROM ${ident(checkedT)} WHERE __reason IS NOT NULL`));
  }
  const csvBad = format === "csv" ? Number(await s.scalar(`SELECT count(*) FROM ${ident(csvRejT)}`)) : 0;
  const lineOffset = format === "csv" && header ? 1 : 0;
  if (bad > 0) {
    await s.run(`INSERT INTO ${REJECTS_TABLE}
      SELECT ${lit(name)}, __file, __row, ${format === "csv" ? `__row + ${lineOffset}` : "NULL"}, __col, __value, __reason
      FROM ${ident(checkedT)} WHERE __reason IS NOT NULL ORDER BY __file, __row`);
  }
  // CSV structural errors (too many / missing columns, bad quoting), found by DuckDB's reader.
  if (csvBad > 0) {
    await s.run(`INSERT INTO ${REJECTS_TABLE}
      SELECT ${lit(name)}, sc.file_path, e.line - ${lineOffset}, e.line, coalesce(e.column_name, '(whole line)'), e.csv_line,
        e.error_type || ': ' || e.error_message
      FROM ${ident(csvRejT)} e JOIN ${ident(csvScanT)} sc USING (scan_id, file_id)
      QUALIFY row_number() OVER (PARTITION BY sc.file_path, e.line ORDER BY e.column_idx) = 1
      ORDER BY sc.file_path, e.line`);
  }
  const rejected = Number(await s.scalar(`SELECT count(*) FROM ${REJECTS_TABLE} WHERE source = ${lit(name)}`));
  const perFile = new Map<string, number>(
    (await s.all(`SELECT __file AS f, count(*) AS n FROM ${ident(checkedT)} GROUP BY 1`)).map((r) => [String(r.f), Number(r.n)]),
  );
  const csvPerFile = format === "csv"
    ? new Map<string, number>((await s.all(`SELECT sc.file_path AS f, count(DISTINCT e.line) AS n FROM ${ident(csvRejT)} e JOIN ${ident(csvScanT)} sc USING (scan_id, file_id) GROUP BY 1`)).map((r) => [String(r.f), Number(r.n)]))
    : new Map<string, number>();
  const okRows = [...perFile.values()].reduce((a, b) => a + b, 0) - bad;
  const rows_read = okRows + rejected;

  // The table: a view over the checked rows (no copy), in file order.
  const outCols = [...cols.map((c) => c.name), ...(hasQty && !hasUnitCol ? ["unit"] : [])];
  const filter = src.filter ? `AND (${src.filter})` : "";
  try {
    await s.run(`CREATE OR REPLACE VIEW ${ident(name)} AS SELECT ${idents(outCols)} FROM ${ident(checkedT)} WHERE ${cleanSelect ? "TRUE" : "__reason IS NULL"} ${filter}`);
  } catch (e) {
    throw new PipelineError(`sources.${name}.filter: ${JSON.stringify(src.filter)} is not a valid condition: ${firstLine(e)}`);
  }
  if (opts.located) {
    const line = format === "csv" ? `__row + ${header ? 1 : 0}` : "__row";
    await s.run(`CREATE OR REPLACE VIEW ${ident(locatedView(name))} AS SELECT ${idents(outCols)}, __file, ${line} AS __line, ${lit(format === "csv" ? "line" : "row")} AS __line_kind
      FROM ${ident(checkedT)} WHERE ${cleanSelect ? "TRUE" : "__reason IS NULL"} ${filter}`);
  }
  let loaded = okRows;
  if (src.filter) {
    try {
      loaded = Number(await s.scalar(`SELECT count(*) FROM ${ident(name)}`));
    } catch (e) {
      throw resourceFailure(e) ?? new DataError(`sources.${name}.filter: ${JSON.stringify(src.filter)} fails on the data of ${files.length === 1 ? files[0] : src.path}: ${firstLines(String((e as Error).message))}`);
    }
  }
  await s.run(`DROP TABLE IF EXISTS ${ident(csvRejT)}; DROP TABLE IF EXISTS ${ident(csvScanT)}`);
  const limits = { ...(pipeline.rejects ?? {}), ...(src.rejects ?? {}) };
  const maxRows = limits.max_rows ?? (limits.max_share === undefined ? 0 : Infinity);
  const maxShare = limits.max_share ?? 1;
  const result: SourceResult = {
    name,
    keys: keyCols,
    rows_read,
    rows_rejected: rejected,
    rows_filtered: okRows - loaded,
    rows_loaded: loaded,
    ...(outCols.includes("year") && loaded > 0 ? { year_max: Number(await s.scalar(`SELECT max(year) FROM ${ident(name)}`)) } : {}),
    files: files.map((f) => ({ source: name, path: f, bytes: hashes.get(f)!.bytes, sha256: hashes.get(f)!.sha256, rows: (perFile.get(f) ?? 0) + (csvPerFile.get(f) ?? 0) })),
  };
  if (rejected > maxRows || (rows_read > 0 && rejected / rows_read > maxShare)) {
    const ex = await s.all(`SELECT file, "row", line, "column", value, reason FROM ${REJECTS_TABLE} WHERE source = ${lit(name)} ORDER BY file, "row" LIMIT 5`);
    const lines = ex.map((r) => `  ${r.file}:${r.line != null ? `line ${r.line}` : `row ${r.row}`}: column ${r.column || "?"}, value ${JSON.stringify(r.value)}: ${r.reason}`);
    const err = new DataError(
      `source ${name}: ${rejected} of ${rows_read} rows rejected (${pct(rejected, rows_read)}), above the limit (${limits.max_rows === undefined && limits.max_share === undefined ? "by default no rejected row is tolerated" : `max_rows ${maxRows === Infinity ? "not set" : maxRows}, max_share ${limits.max_share ?? "not set"}`}); first rejects:\n${lines.join("\n")}\n` +
        `  (all rejects are in rejects.parquet; raise sources.${name}.rejects or the pipeline's rejects: to tolerate them)`,
    );
    (err as DataError & { source?: SourceResult }).source = result;
    throw err;
  }
  if (rows_read === 0 && !src.allow_empty) {
    const err = new DataError(`source ${name}: ${files.length === 1 ? files[0] : `the ${files.length} files of ${src.path}`} ${files.length === 1 ? "has" : "have"} no data rows (a header at most); give data, or set allow_empty: true on the source if an empty table is expected`);
    (err as DataError & { source?: SourceResult }).source = result;
    throw err;
  }
  return result;
  }
}
