/**
 * The data dictionary of a run: every published table (step, kind, role, description, files,
 * rows, keys) and column (type, unit, meaning), and for key columns their distinct codes, with
 * labels where the pipeline names a labels table (`labels: { region: regions }`). Written as
 * `dictionary.json` in every run directory; the same descriptions and units go into each
 * Parquet file's key-value metadata (`cairn.*` keys), so one file alone says what it holds.
 */
import type { Session } from "../engine/session.js";
import { ident } from "../engine/sql.js";
import type { ColumnDecl, OutputDecl } from "../steps/types.js";
import type { Pipeline } from "../spec/schema.js";

/** Codes listed per key column, at most; beyond, only their number. */
const MAX_CODES = 500;

export interface DictColumn {
  name: string;
  type: string;
  unit: string | null;
  description: string;
  key: boolean;
  codes?: { code: string; label?: string }[];
  distinct?: number;
}

export interface DictTable {
  name: string;
  step: string;
  kind: string;
  role: string;
  description: string;
  keys: string[];
  rows: number;
  files: string[];
  columns: DictColumn[];
}

const UNIT_WORDS: Record<string, string> = { year: "calendar year", years: "years", "1": "1 (dimensionless)", count: "count", "per-unit": "material per unit of product" };

/** The unit of a column: the table's own unit for masses, the unit's meaning otherwise. */
export function unitText(c: ColumnDecl, tableUnits: string[]): string | null {
  if (!c.unit) return null;
  if (c.unit === "unit-column") return tableUnits.length ? tableUnits.join(" or ") : null;
  return UNIT_WORDS[c.unit] ?? c.unit;
}

export async function tableUnits(s: Session, table: string, decl: OutputDecl): Promise<string[]> {
  if (!decl.columns.some((c) => c.name === "unit")) return [];
  return (await s.all(`SELECT DISTINCT CAST(unit AS VARCHAR) AS u FROM ${ident(table)} WHERE unit IS NOT NULL ORDER BY 1`)).map((r) => String(r.u));
}

export async function describeTable(s: Session, p: Pipeline, decl: OutputDecl, info: { step: string; kind: string; files: string[]; rows: number }): Promise<DictTable> {
  const units = await tableUnits(s, decl.name, decl);
  const columns: DictColumn[] = [];
  for (const c of decl.columns) {
    const key = decl.keys.includes(c.name);
    const col: DictColumn = { name: c.name, type: c.type, unit: unitText(c, units), description: c.description, key };
    if (key && c.name !== "year" && c.type === "VARCHAR") {
      const n = Number(await s.scalar(`SELECT count(DISTINCT ${ident(c.name)}) FROM ${ident(decl.name)}`));
      col.distinct = n;
      if (n <= MAX_CODES) {
        const labels = p.labels?.[c.name];
        let labelOf = new Map<string, string>();
        if (labels) {
          const lc = (await s.columns(labels)).map((x) => x.name);
          const code = lc.includes(c.name) ? c.name : "code";
          const label = lc.includes("label") ? "label" : "name";
          labelOf = new Map((await s.all(`SELECT CAST(${ident(code)} AS VARCHAR) AS c, CAST(${ident(label)} AS VARCHAR) AS l FROM ${ident(labels)}`)).map((r) => [String(r.c), String(r.l)]));
        }
        col.codes = (await s.all(`SELECT DISTINCT CAST(${ident(c.name)} AS VARCHAR) AS v FROM ${ident(decl.name)} WHERE ${ident(c.name)} IS NOT NULL ORDER BY 1`))
          .map((r) => ({ code: String(r.v), ...(labelOf.has(String(r.v)) ? { label: labelOf.get(String(r.v)) } : {}) }));
      }
    }
    columns.push(col);
  }
  return { name: decl.name, step: info.step, kind: info.kind, role: decl.role, description: decl.description, keys: decl.keys, rows: info.rows, files: info.files, columns };
}

/** The Parquet footer's key-value metadata of a table. */
export function parquetMetadata(decl: OutputDecl, units: string[], caution: string): Record<string, string> {
  return {
    "cairn.table": decl.name,
    "cairn.description": decl.description,
    "cairn.unit": units.join(" or "),
    "cairn.keys": decl.keys.join(","),
    "cairn.columns": JSON.stringify(decl.columns.map((c) => ({ name: c.name, type: c.type, unit: unitText(c, units), description: c.description }))),
    "cairn.caution": caution,
  };
}

/** The dictionary as text, for `cairn describe`. */
export function dictionaryText(tables: DictTable[]): string {
  const out: string[] = [];
  for (const t of tables) {
    out.push(`${t.name} (${t.role} table of step ${t.step}, ${t.kind}; ${t.rows} rows; keys ${t.keys.join(", ") || "none"})`);
    out.push(`  ${t.description}`);
    for (const c of t.columns) {
      out.push(`  - ${c.name} ${c.type}${c.unit ? ` [${c.unit}]` : ""}${c.key ? " (key)" : ""}: ${c.description}`);
      if (c.codes) out.push(`      codes: ${c.codes.map((x) => (x.label ? `${x.code} (${x.label})` : x.code)).join(", ")}`);
      else if (c.distinct !== undefined) out.push(`      ${c.distinct} distinct codes`);
    }
    out.push("");
  }
  return out.join("\n");
}
