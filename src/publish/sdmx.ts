/**
 * SDMX-CSV 2.0 export (SDMX Technical Working Group, SDMX-CSV format specification v2.0.0,
 * 2021, aligned with SDMX 3.0). One file per export, UTF-8, comma-separated, a header row:
 *   STRUCTURE, STRUCTURE_ID, ACTION        the structure type (dataflow, datastructure or
 *                                           dataprovision), its id AGENCY:ID(VERSION), the action
 *                                           (I information, A append, R replace, D delete)
 *   the dimension ids, TIME_PERIOD         the series keys mapped to the office's codes
 *   OBS_VALUE                              the measure, scaled by UNIT_MULT
 *   OBS_STATUS, UNIT_MEASURE, UNIT_MULT    attributes (OBS_STATUS from CL_OBS_STATUS)
 * Values are printed as the shortest decimal at the base unit's resolution (1 g): exact, no
 * float noise. The rules that give OBS_STATUS are documented in the README and can be changed.
 */
import { z } from "zod";
import path from "node:path";
import { mkdirSync, statSync } from "node:fs";
import { Name } from "../spec/common.js";
import { DataError } from "../errors.js";
import type { Session } from "../engine/session.js";
import { ident, lit } from "../engine/sql.js";
import { massFactor } from "../units.js";
import { sha256, type OutputFile } from "./parquet.js";
import type { ExportCheck, ExportContext, Exporter } from "./exporters.js";

/** SDMX-ML IDType (SDMX 3.0 Technical Notes): a letter, then letters, digits, _ or -. */
export const SdmxId = z.string().regex(/^[A-Za-z][A-Za-z0-9_-]*$/, "an SDMX id: a letter, then letters, digits, _ or -");

/** CL_OBS_STATUS, SDMX cross-domain code list (v2.2): the codes DOMAIN.md lists; H, J, K and W from memory. */
export const OBS_STATUS_CODES = ["A", "B", "D", "E", "F", "G", "H", "I", "J", "K", "L", "M", "N", "O", "P", "Q", "S", "U", "V", "W"] as const;
const Status = z.enum(OBS_STATUS_CODES);

export const SdmxExport = z.object({
  format: z.literal("sdmx-csv"),
  table: Name.describe("a published table of the pipeline"),
  file: z.string().regex(/^[A-Za-z0-9_./-]+\.csv$/).refine((f) => !f.split("/").includes("..") && !f.startsWith("/"), "a relative path inside the run directory")
    .optional().describe("the file in the run directory (default sdmx/<table>.csv)"),
  structure: z.enum(["dataflow", "datastructure", "dataprovision"]).default("dataflow"),
  agency: SdmxId.describe("the maintenance agency of the structure"),
  id: SdmxId.describe("the structure's id"),
  version: z.string().regex(/^\d+(\.\d+){0,2}(-[A-Za-z0-9]+)?$/).default("1.0"),
  action: z.enum(["I", "A", "R", "D"]).optional().describe("default I, or R for a release that replaces an earlier one in the catalog"),
  dimensions: z.record(SdmxId, z.union([Name, z.object({ column: Name, codes: Name.optional() }).strict()]))
    .describe("dimension id → the table's column, optionally with a code table (columns value, code) mapping its values to the office's codes"),
  time: Name.default("year").describe("the column of TIME_PERIOD"),
  measure: Name.describe("the column of OBS_VALUE"),
  unit_measure: z.string().min(1).describe("the UNIT_MEASURE code (e.g. T for tonnes)"),
  unit_mult: z.number().int().min(-6).max(15).default(0).describe("UNIT_MULT: values are divided by 10^unit_mult (3: thousands)"),
  obs_status: z.object({ reported: Status.default("A"), estimated: Status.default("E"), forecast: Status.default("F"), provisional: Status.default("P"), missing: Status.default("O") }).strict().optional()
    .describe("the OBS_STATUS code of each case (defaults A, E, F, P; O for a missing value, printed with an empty OBS_VALUE)"),
  estimated_when: Name.optional().describe("a boolean column that marks estimated values (default: mirrored, when the table has it)"),
  forecast_from: z.number().int().optional().describe("the first forecast year (default: the year after the newest data year)"),
  ranges: z.object({
    from: Name.describe("a cohort model's <id>_uncertainty table"),
    lower: Name.default("q05").describe("its column of the lower bound (default q05)"),
    upper: Name.default("q95").describe("its column of the upper bound (default q95)"),
    attributes: z.tuple([SdmxId, SdmxId]).default(["OBS_LOWER", "OBS_UPPER"]).describe("the attribute ids of the two bounds (not SDMX cross-domain concepts: agree them with the office)"),
  }).strict().optional().describe("Monte Carlo bounds of each value as two more attributes, scaled like OBS_VALUE; empty where the table has no range"),
}).strict();
export type SdmxExportT = z.output<typeof SdmxExport>;


/** The exact decimal text of a value at the base unit's resolution (1 g), divided by 10^mult. */
export function decimalSql(expr: string, baseUnit: string, mult: number): string {
  const grams = massFactor(baseUnit, "g"); // a power of ten for every mass unit
  const digits = Math.round(Math.log10(grams)) + mult;
  const g = `CAST(round((${expr}) * ${grams}) AS HUGEINT)`;
  const sign = `CASE WHEN ${g} < 0 THEN '-' ELSE '' END`;
  if (digits <= 0) return `(${sign} || CAST(abs(${g}) AS VARCHAR) || ${lit("0".repeat(-digits))})`;
  // Zeros in front up to digits + 1 characters (DuckDB's lpad would cut a longer text).
  const raw = `CAST(abs(${g}) AS VARCHAR)`;
  const s = `(repeat('0', greatest(0, ${digits + 1} - length(${raw}))) || ${raw})`;
  const int = `left(${s}, length(${s}) - ${digits})`;
  const frac = `rtrim(right(${s}, ${digits}), '0')`;
  return `(CASE WHEN ${g} = 0 THEN '0' ELSE ${sign} || ${int} || CASE WHEN ${frac} = '' THEN '' ELSE '.' || ${frac} END END)`;
}

async function writeSdmx(e: SdmxExportT, x: ExportContext): Promise<OutputFile> {
  const s = x.session;
  const columns = x.columns;
  const file = e.file ?? `sdmx/${e.table}.csv`;
  const target = path.join(x.dir, file);
  mkdirSync(path.dirname(target), { recursive: true });
  const dims = Object.entries(e.dimensions).map(([id, d]) => ({ id, column: typeof d === "string" ? d : d.column, codes: typeof d === "string" ? undefined : d.codes }));
  // Every value of a mapped dimension must have a code: a missing one is named, never dropped.
  for (const d of dims) {
    if (!d.codes) continue;
    const missing = await s.all(`SELECT DISTINCT CAST(t.${ident(d.column)} AS VARCHAR) AS v FROM ${ident(e.table)} t
      ANTI JOIN ${ident(d.codes)} c ON CAST(c.value AS VARCHAR) = CAST(t.${ident(d.column)} AS VARCHAR) ORDER BY 1 LIMIT 10`);
    if (missing.length) throw new DataError(`export ${e.id} (${e.table}): dimension ${d.id}: the value(s) ${missing.map((m) => JSON.stringify(m.v)).join(", ")} of ${d.column} have no code in ${d.codes} (columns value, code); add them`);
    const dup = await s.all(`SELECT CAST(value AS VARCHAR) AS v FROM ${ident(d.codes)} GROUP BY 1 HAVING count(DISTINCT code) > 1 LIMIT 3`);
    if (dup.length) throw new DataError(`export ${e.id}: code table ${d.codes} gives several codes for ${dup.map((r) => JSON.stringify(r.v)).join(", ")}`);
    const badCode = await s.all(`SELECT DISTINCT CAST(code AS VARCHAR) AS c FROM ${ident(d.codes)} WHERE NOT regexp_full_match(CAST(code AS VARCHAR), '[A-Za-z0-9_@$\\-]+') LIMIT 3`);
    if (badCode.length) throw new DataError(`export ${e.id}: code table ${d.codes} has code(s) ${badCode.map((r) => JSON.stringify(r.c)).join(", ")} that are not SDMX codes (letters, digits, _ @ $ -)`);
  }
  const st = { reported: "A", estimated: "E", forecast: "F", provisional: "P", missing: "O", ...e.obs_status };
  const estCol = e.estimated_when ?? (columns.includes("mirrored") ? "mirrored" : undefined);
  const forecastFrom = e.forecast_from ?? (x.newestDataYear !== null ? x.newestDataYear + 1 : null);
  const status = `CASE WHEN t.${ident(e.measure)} IS NULL THEN ${lit(st.missing)} ${x.provisional ? `WHEN TRUE THEN ${lit(st.provisional)}` : ""}
      ${forecastFrom !== null ? `WHEN t.${ident(e.time)} >= ${forecastFrom} THEN ${lit(st.forecast)}` : ""}
      ${x.modelled ? `WHEN TRUE THEN ${lit(st.estimated)}` : ""}
      ${estCol ? `WHEN coalesce(t.${ident(estCol)}, FALSE) THEN ${lit(st.estimated)}` : ""}
      ELSE ${lit(st.reported)} END`;
  const action = e.action ?? (x.replaces ? "R" : "I");
  const dimSel = dims.map((d, i) => (d.codes ? `c${i}.code` : `CAST(t.${ident(d.column)} AS VARCHAR)`) + ` AS ${ident(d.id)}`);
  const joins = dims.map((d, i) => (d.codes ? `JOIN (SELECT DISTINCT CAST(value AS VARCHAR) AS value, CAST(code AS VARCHAR) AS code FROM ${ident(d.codes)}) c${i} ON c${i}.value = CAST(t.${ident(d.column)} AS VARCHAR)` : "")).join(" ");
  const order = [...dims.map((d) => `t.${ident(d.column)}`), `t.${ident(e.time)}`].join(", ");
  const bounds = await rangeJoin(s, e, x, columns);
  await s.run(`COPY (SELECT ${lit(e.structure)} AS STRUCTURE, ${lit(`${e.agency}:${e.id}(${e.version})`)} AS STRUCTURE_ID, ${lit(action)} AS ACTION,
      ${dimSel.join(", ")}, CAST(t.${ident(e.time)} AS VARCHAR) AS TIME_PERIOD,
      ${decimalSql(`t.${ident(e.measure)}`, x.baseUnit, e.unit_mult)} AS OBS_VALUE,
      ${status} AS OBS_STATUS, ${lit(e.unit_measure)} AS UNIT_MEASURE, ${lit(String(e.unit_mult))} AS UNIT_MULT${bounds.select}
    FROM ${ident(e.table)} t ${joins} ${bounds.join} ORDER BY ${order})
    TO ${lit(target)} (FORMAT csv, HEADER true, DELIMITER ',', QUOTE '"')`);
  const rows = Number(await s.scalar(`SELECT count(*) FROM read_csv(${lit(target)}, header = true, all_varchar = true)`));
  return { table: e.table, format: "sdmx-csv", file, rows, bytes: statSync(target).size, sha256: sha256(target) };
}

/** The columns of a ranges table matched to the exported table's rows (key columns shared by name; the special ones apart). */
const RANGE_SPECIAL = ["total_over", "material", "variable", "year"];

async function rangeJoin(s: Session, e: SdmxExportT, x: ExportContext, columns: string[]): Promise<{ select: string; join: string }> {
  const r = e.ranges;
  if (!r) return { select: "", join: "" };
  const rcols = (await s.all(`SELECT column_name FROM (DESCRIBE ${ident(r.from)})`)).map((c) => String(c.column_name));
  const shared = rcols.filter((c) => columns.includes(c) && !RANGE_SPECIAL.includes(c) && c !== r.lower && c !== r.upper && !["central", "mean", "sd", "unit"].includes(c) && !/^q\d/.test(c));
  const on = [...shared.map((c) => `CAST(u.${ident(c)} AS VARCHAR) = CAST(t.${ident(c)} AS VARCHAR)`), `u.year = t.${ident(e.time)}`, "u.total_over IS NULL",
    `u.variable = ${lit(e.measure)}`, columns.includes("material") ? "u.material = t.material" : "u.material IS NULL"];
  const [lo, hi] = r.attributes;
  return {
    select: `, ${decimalSql(`u.${ident(r.lower)}`, x.baseUnit, e.unit_mult)} AS ${ident(lo)}, ${decimalSql(`u.${ident(r.upper)}`, x.baseUnit, e.unit_mult)} AS ${ident(hi)}`,
    join: `LEFT JOIN ${ident(r.from)} u ON ${on.join(" AND ")}`,
  };
}

const NUMERIC = /^(DOUBLE|FLOAT|REAL|DECIMAL.*|HUGEINT|BIGINT|INTEGER|SMALLINT|TINYINT)$/;

/** Plan-stage checks: every column named exists, code tables have value and code, the measure is numeric. */
function checkSdmx(e: SdmxExportT, c: ExportCheck): void {
  const need = (col: string, k: string) => {
    if (!c.columns.has(col)) c.fail(k, `${e.table} has no column ${col} (its columns: ${[...c.columns.keys()].join(", ")})`);
  };
  for (const [id, d] of Object.entries(e.dimensions)) {
    need(typeof d === "string" ? d : d.column, "dimensions");
    if (typeof d !== "string" && d.codes) {
      const cs = c.schemas.get(d.codes);
      if (!cs) c.fail("dimensions", `dimension ${id}: no table ${JSON.stringify(d.codes)} (a source or a step's table with columns value and code)`);
      const missing = ["value", "code"].filter((k) => !cs.columns.some((x) => x.name === k));
      if (missing.length) c.fail("dimensions", `dimension ${id}: code table ${d.codes} lacks column(s) ${missing.join(", ")} (contract: value, code, optional label)`);
      c.reads(d.codes);
    }
  }
  need(e.time, "time");
  need(e.measure, "measure");
  if (!NUMERIC.test(c.columns.get(e.measure)!)) c.fail("measure", `${e.measure} (${c.columns.get(e.measure)}) is not numeric`);
  if (e.ranges) {
    const rs = c.schemas.get(e.ranges.from);
    if (!rs) c.fail("ranges", `no table ${JSON.stringify(e.ranges.from)}; give a cohort model's <id>_uncertainty table`);
    const names = rs.columns.map((x) => x.name);
    const missing = [e.ranges.lower, e.ranges.upper, "variable", "year", "total_over", "material"].filter((k) => !names.includes(k));
    if (missing.length) c.fail("ranges", `table ${e.ranges.from} lacks column(s) ${missing.join(", ")} (an <id>_uncertainty table has variable, year, total_over, material and the quantiles)`);
    c.reads(e.ranges.from);
  }
  if (e.estimated_when) {
    need(e.estimated_when, "estimated_when");
    if (c.columns.get(e.estimated_when) !== "BOOLEAN") c.fail("estimated_when", `${e.estimated_when} is not a boolean column`);
  }
}

export const sdmxCsv: Exporter<SdmxExportT> = {
  format: "sdmx-csv",
  schema: SdmxExport as unknown as z.ZodType<SdmxExportT>,
  label: (e) => `${e.agency}:${e.id}`,
  check: checkSdmx,
  write: writeSdmx,
};
