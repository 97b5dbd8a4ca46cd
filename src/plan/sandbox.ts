/**
 * Pipeline SQL in a sandbox: an `sql` step's query and a source's `filter` are parsed by
 * DuckDB's own parser (json_serialize_sql) before anything runs. A query must be one SELECT
 * that reads only the tables its step lists in `inputs` (and its own CTEs) and no table
 * function but a few that make rows (range, generate_series, unnest); a filter is one
 * condition that reads no table at all. Anything else is refused with exit 2 and the text.
 * Binding (names and types of a query's columns) happens in a scratch in-memory DuckDB with
 * every file, database and extension access switched off.
 */
import { DuckDBInstance, type DuckDBConnection } from "@duckdb/node-api";
import { PipelineError } from "../errors.js";
import { ident, lit } from "../engine/sql.js";
import type { TableSchema } from "../steps/types.js";

/** Table functions that only make rows from their arguments. */
export const ROW_FUNCTIONS = ["range", "generate_series", "unnest"] as const;

interface Refs {
  tables: { name: string; schema: string; at: number }[];
  functions: { name: string; at: number }[];
  ctes: Set<string>;
}

function walk(node: unknown, refs: Refs): void {
  if (Array.isArray(node)) {
    for (const n of node) walk(n, refs);
    return;
  }
  if (!node || typeof node !== "object") return;
  const o = node as Record<string, unknown>;
  if (o.type === "BASE_TABLE" && typeof o.table_name === "string") {
    refs.tables.push({ name: o.table_name, schema: String(o.schema_name ?? "") + String(o.catalog_name ?? ""), at: Number(o.query_location) });
  }
  if (o.type === "TABLE_FUNCTION" && o.function && typeof o.function === "object") {
    const f = o.function as Record<string, unknown>;
    refs.functions.push({ name: String(f.function_name), at: Number(o.query_location) });
  }
  if (o.cte_map && typeof o.cte_map === "object") {
    for (const e of ((o.cte_map as { map?: { key: string }[] }).map ?? [])) refs.ctes.add(e.key.toLowerCase());
  }
  for (const v of Object.values(o)) if (v && typeof v === "object") walk(v, refs);
}

const excerpt = (text: string, at?: number) => {
  const flat = text.replace(/\s+/g, " ").trim();
  if (at === undefined || !Number.isFinite(at) || at > text.length) return JSON.stringify(flat.length > 120 ? flat.slice(0, 117) + "..." : flat);
  const around = text.slice(Math.max(0, at - 20), at + 60).replace(/\s+/g, " ");
  return JSON.stringify(around);
};

export class SqlSandbox {
  private constructor(private readonly inst: DuckDBInstance, private readonly conn: DuckDBConnection) {}
  private n = 0;

  static async open(): Promise<SqlSandbox> {
    const inst = await DuckDBInstance.create(":memory:", {
      enable_external_access: "false",
      autoinstall_known_extensions: "false",
      autoload_known_extensions: "false",
      threads: "1",
    });
    // External access cannot be switched back on while the database runs (DuckDB refuses), so no lock is needed to keep it off.
    const conn = await inst.connect();
    return new SqlSandbox(inst, conn);
  }

  close(): void {
    try {
      this.conn.closeSync();
    } finally {
      this.inst.closeSync();
    }
  }

  private async parse(sql: string): Promise<unknown> {
    const r = await this.conn.runAndReadAll(`SELECT json_serialize_sql(${lit(sql)}) AS j`);
    const j = JSON.parse(String(r.getRowObjectsJS()[0]!.j)) as { error: boolean; error_message?: string; statements?: unknown[] };
    if (j.error) {
      const m = String(j.error_message ?? "");
      throw new Error(/only SELECT/i.test(m) ? "only one SELECT is accepted (no other statement: COPY, ATTACH, CREATE, INSTALL, SET, …)" : m.split("\n")[0]);
    }
    if ((j.statements ?? []).length !== 1) throw new Error(`only one SELECT is accepted; this text holds ${(j.statements ?? []).length} statements`);
    return j.statements![0];
  }

  /** The parse tree of one SELECT (json_serialize_sql's statement), for the shard analysis (plan/sql-keys.ts). */
  async parseTree(sql: string): Promise<Record<string, unknown>> {
    return (await this.parse(sql)) as Record<string, unknown>;
  }

  /** Lower-case names of the engine's aggregate functions. */
  async aggregateNames(): Promise<Set<string>> {
    const r = await this.conn.runAndReadAll(`SELECT DISTINCT lower(function_name) AS f FROM duckdb_functions() WHERE function_type = 'aggregate'`);
    return new Set(r.getRowObjectsJS().map((x) => String(x.f)));
  }

  /**
   * Checks a step's query: one SELECT reading only `inputs` (and its CTEs), no table function
   * but ROW_FUNCTIONS. `where` prefixes messages (file:line:col: key path).
   */
  async checkQuery(sql: string, inputs: readonly string[], where: string): Promise<void> {
    let stmt: unknown;
    try {
      stmt = await this.parse(sql);
    } catch (e) {
      throw new PipelineError(`${where}: refused: ${(e as Error).message}: ${excerpt(sql)}`);
    }
    const refs: Refs = { tables: [], functions: [], ctes: new Set() };
    walk(stmt, refs);
    const allowed = new Set(inputs.map((t) => t.toLowerCase()));
    for (const t of refs.tables) {
      const name = t.name.toLowerCase();
      if (t.schema) throw new PipelineError(`${where}: refused: the query names a schema or database (${t.schema}.${t.name}); read only the tables listed in inputs: ${excerpt(sql, t.at)}`);
      if (!allowed.has(name) && !refs.ctes.has(name)) {
        throw new PipelineError(`${where}: the query reads ${JSON.stringify(t.name)}, which is not listed in inputs (${inputs.join(", ") || "none"}); add it to inputs if it is a source or an earlier step's table: ${excerpt(sql, t.at)}`);
      }
    }
    for (const f of refs.functions) {
      if (!(ROW_FUNCTIONS as readonly string[]).includes(f.name.toLowerCase())) {
        throw new PipelineError(`${where}: refused: table function ${f.name}() reads outside the run; a query reads only the tables listed in inputs (table functions accepted: ${ROW_FUNCTIONS.join(", ")}): ${excerpt(sql, f.at)}`);
      }
    }
  }

  /** Checks a source filter: one condition, no table, no subquery reaching a table, no table function. */
  async checkFilter(cond: string, columns: readonly { name: string; type: string }[], where: string): Promise<void> {
    let stmt: unknown;
    try {
      stmt = await this.parse(`SELECT * FROM __filter_target WHERE (${cond})`);
    } catch (e) {
      throw new PipelineError(`${where}: refused: a filter is one condition over the source's columns (${(e as Error).message}): ${excerpt(cond)}`);
    }
    const refs: Refs = { tables: [], functions: [], ctes: new Set() };
    walk(stmt, refs);
    const extra = refs.tables.filter((t) => t.name !== "__filter_target");
    if (extra.length || refs.functions.length || refs.tables.length !== 1) {
      throw new PipelineError(`${where}: refused: a filter reads only its own source's columns (${columns.map((c) => c.name).join(", ")}); it names ${[...extra.map((t) => `table ${t.name}`), ...refs.functions.map((f) => `function ${f.name}()`)].join(", ") || "another relation"}: ${excerpt(cond)}`);
    }
    await this.bind(`SELECT * FROM __filter_target WHERE (${cond})`, { __filter_target: { keys: [], columns: columns.map((c) => ({ name: c.name, type: c.type, description: "" })) } }, where, "filter");
  }

  /** Output columns of a SELECT over empty tables with the given schemas. */
  async bind(sql: string, tables: Record<string, TableSchema>, where: string, what = "query"): Promise<{ name: string; type: string }[]> {
    const schema = `b${++this.n}`;
    await this.conn.run(`CREATE SCHEMA ${schema}`);
    try {
      for (const [name, t] of Object.entries(tables)) {
        await this.conn.run(`CREATE TABLE ${schema}.${ident(name)} (${t.columns.map((c) => `${ident(c.name)} ${c.type}`).join(", ") || "__empty INTEGER"})`);
      }
      await this.conn.run(`SET search_path = '${schema}'`);
      const r = await this.conn.runAndReadAll(`DESCRIBE ${sql}`);
      return r.getRowObjectsJS().map((row) => ({ name: String(row.column_name), type: String(row.column_type) }));
    } catch (e) {
      const m = String((e as Error).message).split("\n")[0]!.replace(new RegExp(`\\b${schema}\\.`, "g"), "");
      throw new PipelineError(`${where}: the ${what} does not bind over the declared tables: ${m}`);
    } finally {
      await this.conn.run(`SET search_path = 'main'`);
      await this.conn.run(`DROP SCHEMA ${schema} CASCADE`);
    }
  }
}
