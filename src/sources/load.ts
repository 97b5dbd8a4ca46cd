/**
 * Sources: named tables read by DuckDB itself (CSV, Parquet, globs, hive folders), typed and
 * unit-converted in SQL. Rows that break the declared types or constraints go to the rejects
 * table with file, row and reason; nothing is dropped silently.
 */
import { createHash } from "node:crypto";
import { createReadStream, existsSync, statSync } from "node:fs";
import path from "node:path";
import { DataError, PipelineError } from "../errors.js";
import type { Session } from "../engine/session.js";
import { ident, idents, lit } from "../engine/sql.js";
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
  rowsRead: number;
  rowsRejected: number;
  rowsFiltered: number;
  rowsLoaded: number;
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

function readExpr(src: SourceT, files: string[], format: "csv" | "parquet", extra = ""): string {
  const list = `[${files.map(lit).join(", ")}]`;
  if (format === "parquet") {
    return `read_parquet(${list}, filename = '__file', file_row_number = true, hive_partitioning = ${src.hive ? "true" : "false"}, union_by_name = true)`;
  }
  const header = src.csv?.header ?? true;
  return `read_csv(${list}, ${csvArgs(src, header)}${extra})`;
}

/** The columns of the files, before rename, as DuckDB sees them. */
export async function fileColumns(s: Session, src: SourceT, files: string[], format: "csv" | "parquet"): Promise<string[]> {
  const cols = await s.all(`DESCRIBE SELECT * FROM ${readExpr(src, files, format, format === "csv" ? ", ignore_errors = true" : "")}`);
  return cols.map((c) => String(c.column_name)).filter((c) => c !== "__file" && c !== "file_row_number");
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

async function sha256File(file: string): Promise<string> {
  const h = createHash("sha256");
  await new Promise<void>((resolve, reject) => {
    createReadStream(file)
      .on("data", (d) => h.update(d))
      .on("end", () => resolve())
      .on("error", reject);
  });
  return h.digest("hex");
}

export async function hashFiles(files: string[]): Promise<Map<string, { bytes: number; sha256: string }>> {
  const out = new Map<string, { bytes: number; sha256: string }>();
  await Promise.all(files.map(async (f) => out.set(f, { bytes: statSync(f).size, sha256: await sha256File(f) })));
  return out;
}

export async function initRejects(s: Session): Promise<void> {
  await s.run(`CREATE OR REPLACE TABLE ${REJECTS_TABLE} (source VARCHAR, file VARCHAR, "row" BIGINT, line BIGINT,
    "column" VARCHAR, value VARCHAR, reason VARCHAR)`);
}

/** Typed value expression and failure condition (with its reason) per declared column. */
function columnRules(c: Col, src: SourceT, pipeline: Pipeline): { typed: string; checks: [string, string][] } {
  const raw = ident(c.name);
  const txt = `NULLIF(trim(CAST(${raw} AS VARCHAR)), '')`;
  const decimal = src.csv?.decimal === "," ? `replace(${txt}, ',', '.')` : txt;
  const checks: [string, string][] = [];
  const missing = c.key ? `missing key ${c.name}` : `missing value in ${c.name}`;
  if (!c.nullable) checks.push([`${txt} IS NULL`, lit(missing)]);
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
      const d = `TRY_CAST(${decimal} AS DOUBLE)`;
      typed = `CAST(${d} AS BIGINT)`;
      checks.push([`${txt} IS NOT NULL AND (${d} IS NULL OR NOT isfinite(${d}) OR ${d} <> round(${d}))`, lit(`${c.name} is not a whole number`)]);
      if (c.name === "year" && pipeline.years) {
        checks.push([
          `${d} IS NOT NULL AND isfinite(${d}) AND (${d} < ${pipeline.years.first} OR ${d} > ${pipeline.years.last})`,
          lit(`year outside the horizon ${pipeline.years.first}..${pipeline.years.last}`),
        ]);
      }
      break;
    }
    case "number":
    case "quantity": {
      typed = `TRY_CAST(${decimal} AS DOUBLE)`;
      checks.push([`${txt} IS NOT NULL AND ${typed} IS NULL`, lit(`${c.name} is not a number${src.csv?.decimal === "," ? " (decimal comma expected)" : ""}`)]);
      checks.push([`${typed} IS NOT NULL AND NOT isfinite(${typed})`, lit(`${c.name} is not finite (NaN or infinite)`)]);
      if (!c.allowNegative) checks.push([`${typed} < 0`, lit(`negative ${c.name} (set allow_negative: true on the column to accept it)`)]);
      break;
    }
  }
  return { typed, checks };
}

function pct(n: number, d: number): string {
  return d === 0 ? "0 %" : `${((100 * n) / d).toFixed(3)} %`;
}

/** Loads one source into a table of its name; rejected rows into the rejects table. */
export async function loadSource(s: Session, pipeline: Pipeline, name: string, src: SourceT, dir: string,
  log: (m: string) => void = () => {}): Promise<SourceResult> {
  const { files, format } = await sourceFiles(s, name, src, dir);
  await checkColumns(s, name, src, files, format);
  const hashes = await hashFiles(files);
  const cols = normaliseColumns(src.columns);
  const header = src.csv?.header ?? true;
  const rawT = `__raw_${name}`;
  const csvRejT = `__csvrej_${name}`;
  const csvScanT = `__csvscan_${name}`;

  // Select list with renames (and positional names when there is no header).
  const selectRaw = async (numbered: boolean): Promise<void> => {
    let from: string;
    if (format === "csv") {
      const names = header ? "" : `, names = [${Object.keys(src.columns).map(lit).join(", ")}]`;
      from = readExpr(src, files, "csv", `, store_rejects = true, rejects_table = ${lit(csvRejT)}, rejects_scan = ${lit(csvScanT)}${names}${numbered ? ", parallel = false" : ""}`);
    } else from = readExpr(src, files, "parquet");
    const found = await fileColumns(s, src, files, format);
    const parts = found.map((c) => `${ident(c)} AS ${ident(src.rename?.[c] ?? c)}`);
    const rowExpr =
      format === "parquet" ? "file_row_number + 1" : numbered ? "row_number() OVER (PARTITION BY __file)" : "CAST(NULL AS BIGINT)";
    await s.run(`DROP TABLE IF EXISTS ${ident(csvRejT)}; DROP TABLE IF EXISTS ${ident(csvScanT)}`);
    await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(rawT)} AS SELECT ${parts.join(", ")}, __file, ${rowExpr} AS __row FROM ${from}`);
  };

  const rules = cols.map((c) => ({ c, ...columnRules(c, src, pipeline) }));
  // Units.
  let unitTyped: string | null = null;
  let unitFactor = "1";
  const unitChecks: [string, string][] = [];
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
      unitChecks.push([`${u} IS NOT NULL AND ${u} <> '' AND ${mf} IS NULL AND NOT ${sqlIsPiece(u)}`, lit(`unknown unit in ${src.unit_column}; accepted: ${acceptedUnits()}`)]);
    }
  }
  const allChecks: { cond: string; reason: string; column: string }[] = [];
  for (const r of rules) for (const [cond, reason] of r.checks) allChecks.push({ cond, reason, column: r.c.name });
  for (const [cond, reason] of unitChecks) allChecks.push({ cond, reason, column: src.unit_column! });
  const keyCols = cols.filter((c) => c.key).map((c) => c.name);
  const reasonExpr = allChecks.length ? `concat_ws('; ', ${allChecks.map((k) => `CASE WHEN ${k.cond} THEN ${k.reason} END`).join(", ")})` : "''";
  const firstCol = allChecks.length ? `CASE ${allChecks.map((k) => `WHEN ${k.cond} THEN ${lit(k.column)}`).join(" ")} END` : "NULL";
  const hasUnitCol = cols.some((c) => c.name === "unit");
  const typedSelFinal = rules
    .map((r) => {
      if (hasQty && r.c.name === "unit") return `${unitTyped} AS "unit"`;
      const t = r.c.type === "quantity" ? `(${r.typed}) * ${unitFactor}` : r.typed;
      return `${t} AS ${ident(r.c.name)}`;
    })
    .concat(hasQty && !hasUnitCol ? [`${unitTyped} AS unit`] : [])
    .join(", ");

  const checkedT = `__checked_${name}`;
  const buildChecked = async (): Promise<void> => {
    await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(checkedT)} AS
      SELECT ${typedSelFinal}, __file, __row, NULLIF(${reasonExpr}, '') AS __reason, ${firstCol} AS __col
      FROM ${ident(rawT)}`);
    if (keyCols.length > 0) {
      await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(checkedT)} AS
        SELECT * REPLACE (CASE WHEN __reason IS NULL AND __dups > 1 THEN 'duplicate key (' || ${keyCols.map((k) => `${lit(k + "=")} || CAST(${ident(k)} AS VARCHAR)`).join(` || ', ' || `)} || ') occurs ' || __dups || ' times' ELSE __reason END AS __reason,
                           CASE WHEN __reason IS NULL AND __dups > 1 THEN ${lit(keyCols.join(","))} ELSE __col END AS __col)
        FROM (SELECT *, count(*) FILTER (WHERE __reason IS NULL) OVER (PARTITION BY ${idents(keyCols)}) AS __dups FROM ${ident(checkedT)})`);
      await s.run(`ALTER TABLE ${ident(checkedT)} DROP COLUMN __dups`);
    }
  };

  log(`source ${name}: reading ${files.length} file(s)`);
  try {
    await selectRaw(false);
  } catch (e) {
    throw new DataError(`source ${name}: cannot read ${files.length === 1 ? files[0] : src.path}: ${firstLine(e)}`);
  }
  await buildChecked();
  let bad = Number(await s.scalar(`SELECT count(*) FROM ${ident(checkedT)} WHERE __reason IS NOT NULL`));
  const csvBad = format === "csv" ? Number(await s.scalar(`SELECT count(*) FROM ${ident(csvRejT)}`)) : 0;
  if (bad > 0 && format === "csv") {
    // Locate rejected rows: a second, ordered read gives each row its number within its file.
    await selectRaw(true);
    await buildChecked();
    bad = Number(await s.scalar(`SELECT count(*) FROM ${ident(checkedT)} WHERE __reason IS NOT NULL`));
  }
  const lineOffset = format === "csv" && header ? 1 : 0;
  // Row-level rejects: value of the first failing column.
  const valueCase = allChecks.length
    ? `CASE ${[...new Set(allChecks.map((k) => k.column))].map((c) => `WHEN r.__col = ${lit(c)} THEN CAST(raw.${ident(c)} AS VARCHAR)`).join(" ")} END`
    : "NULL";
  await s.run(`INSERT INTO ${REJECTS_TABLE}
    SELECT ${lit(name)}, c.__file, c.__row, ${format === "csv" ? `c.__row + ${lineOffset}` : "NULL"}, c.__col,
      ${valueCase.replace(/r\.__col/g, "c.__col").replace(/raw\./g, "raw.")}, c.__reason
    FROM ${ident(checkedT)} c JOIN ${ident(rawT)} raw ON raw.__file = c.__file AND raw.__row IS NOT DISTINCT FROM c.__row AND c.__reason IS NOT NULL
    ${keyCols.length ? "" : ""}
    ORDER BY c.__file, c.__row`);
  // CSV structural errors (too many / missing columns, bad quoting), found by DuckDB's reader.
  if (csvBad > 0) {
    await s.run(`INSERT INTO ${REJECTS_TABLE}
      SELECT ${lit(name)}, sc.file_path, e.line - ${lineOffset}, e.line, coalesce(e.column_name, ''), e.csv_line,
        e.error_type || ': ' || e.error_message
      FROM ${ident(csvRejT)} e JOIN ${ident(csvScanT)} sc USING (scan_id, file_id)
      QUALIFY row_number() OVER (PARTITION BY sc.file_path, e.line ORDER BY e.column_idx) = 1
      ORDER BY sc.file_path, e.line`);
  }
  const rejected = Number(await s.scalar(`SELECT count(*) FROM ${REJECTS_TABLE} WHERE source = ${lit(name)}`));
  const okRows = Number(await s.scalar(`SELECT count(*) FROM ${ident(checkedT)} WHERE __reason IS NULL`));
  const rowsRead = okRows + rejected;

  // The table, in a fixed order (file, row) so that later steps see the same input every time.
  const outCols = [...cols.map((c) => c.name), ...(hasQty && !hasUnitCol ? ["unit"] : [])];
  const filter = src.filter ? `AND (${src.filter})` : "";
  try {
    await s.run(`CREATE OR REPLACE TABLE ${ident(name)} AS SELECT ${idents(outCols)} FROM ${ident(checkedT)} WHERE __reason IS NULL ${filter}`);
  } catch (e) {
    throw new PipelineError(`sources.${name}.filter: ${JSON.stringify(src.filter)} is not a valid condition: ${firstLine(e)}`);
  }
  const loaded = Number(await s.scalar(`SELECT count(*) FROM ${ident(name)}`));
  const perFile = new Map<string, number>(
    (await s.all(`SELECT __file AS f, count(*) AS n FROM ${ident(rawT)} GROUP BY 1`)).map((r) => [String(r.f), Number(r.n)]),
  );
  const csvPerFile = format === "csv"
    ? new Map<string, number>((await s.all(`SELECT sc.file_path AS f, count(DISTINCT e.line) AS n FROM ${ident(csvRejT)} e JOIN ${ident(csvScanT)} sc USING (scan_id, file_id) GROUP BY 1`)).map((r) => [String(r.f), Number(r.n)]))
    : new Map<string, number>();
  await s.run(`DROP TABLE IF EXISTS ${ident(rawT)}; DROP TABLE IF EXISTS ${ident(checkedT)}; DROP TABLE IF EXISTS ${ident(csvRejT)}; DROP TABLE IF EXISTS ${ident(csvScanT)}`);

  const limits = { ...(pipeline.rejects ?? {}), ...(src.rejects ?? {}) };
  const maxRows = limits.max_rows ?? (limits.max_share === undefined ? 0 : Infinity);
  const maxShare = limits.max_share ?? 1;
  const result: SourceResult = {
    name,
    keys: keyCols,
    rowsRead,
    rowsRejected: rejected,
    rowsFiltered: okRows - loaded,
    rowsLoaded: loaded,
    files: files.map((f) => ({ source: name, path: f, bytes: hashes.get(f)!.bytes, sha256: hashes.get(f)!.sha256, rows: (perFile.get(f) ?? 0) + (csvPerFile.get(f) ?? 0) })),
  };
  if (rejected > maxRows || (rowsRead > 0 && rejected / rowsRead > maxShare)) {
    const ex = await s.all(`SELECT file, "row", line, "column", value, reason FROM ${REJECTS_TABLE} WHERE source = ${lit(name)} ORDER BY file, "row" LIMIT 5`);
    const lines = ex.map((r) => `  ${r.file}:${r.line != null ? `line ${r.line}` : `row ${r.row}`}: column ${r.column || "?"}, value ${JSON.stringify(r.value)}: ${r.reason}`);
    const err = new DataError(
      `source ${name}: ${rejected} of ${rowsRead} rows rejected (${pct(rejected, rowsRead)}), above the limit (max_rows ${maxRows === Infinity ? "none" : maxRows}, max_share ${maxShare}); first rejects:\n${lines.join("\n")}\n` +
        `  (all rejects are in rejects.parquet; raise sources.${name}.rejects or the pipeline's rejects: to tolerate them)`,
    );
    (err as DataError & { source?: SourceResult }).source = result;
    throw err;
  }
  return result;
}
