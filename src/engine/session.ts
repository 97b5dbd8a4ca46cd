/** The DuckDB session: one embedded instance, one connection, documented settings. */
import { DuckDBConnection, DuckDBInstance } from "@duckdb/node-api";

export interface SessionOptions {
  /** DuckDB memory limit, e.g. "6GB" (default: DuckDB's own, 80 % of RAM). */
  memoryLimit?: string;
  /** Worker threads for SQL (default: all cores). */
  threads?: number;
  /** Where DuckDB spills when the memory limit is reached. */
  tempDirectory?: string;
}

export type Row = Record<string, unknown>;

/** CAIRN_PROFILE=1 prints every statement slower than 50 ms to stderr (for tuning). */
const PROFILE = process.env.CAIRN_PROFILE === "1";
const PROFILE_MS = Number(process.env.CAIRN_PROFILE_MS ?? 50);
/** CAIRN_EXPLAIN=<regular expression>: statements run() with matching text print DuckDB's EXPLAIN ANALYZE profile (for tuning). */
const EXPLAIN = process.env.CAIRN_EXPLAIN ? new RegExp(process.env.CAIRN_EXPLAIN) : null;
function profile(sql: string, t0: number): void {
  const ms = performance.now() - t0;
  if (ms > PROFILE_MS) process.stderr.write(`[sql ${ms.toFixed(0)} ms] ${sql.replace(/\s+/g, " ").slice(0, Number(process.env.CAIRN_PROFILE_CHARS ?? 160))}\n`);
}

export class Session {
  private constructor(
    readonly instance: DuckDBInstance,
    readonly conn: DuckDBConnection,
  ) {}

  static async open(opts: SessionOptions = {}): Promise<Session> {
    const config: Record<string, string> = {};
    if (opts.memoryLimit) config.memory_limit = opts.memoryLimit;
    if (opts.threads) config.threads = String(opts.threads);
    if (opts.tempDirectory) config.temp_directory = opts.tempDirectory;
    // No extension is ever installed or loaded from outside (only those built into the engine).
    config.autoinstall_known_extensions = "false";
    config.autoload_known_extensions = "false";
    const instance = await DuckDBInstance.create(":memory:", config);
    const conn = await instance.connect();
    // Keep file order in scans and writes: needed for row numbers and a fixed output order.
    await conn.run("SET preserve_insertion_order = true");
    return new Session(instance, conn);
  }

  async run(sql: string): Promise<void> {
    const t0 = PROFILE ? performance.now() : 0;
    if (EXPLAIN && EXPLAIN.test(sql)) {
      // Runs the statement under EXPLAIN ANALYZE (which executes it) and prints DuckDB's profile.
      const r = await this.conn.runAndReadAll(`EXPLAIN ANALYZE ${sql}`);
      process.stderr.write(`${r.getRows().map((row) => String(row[1])).join("\n")}\n`);
      return;
    }
    await this.conn.run(sql);
    if (PROFILE) profile(sql, t0);
  }

  /** Small results only: rows as plain JSON-compatible objects (BIGINT → number). */
  async all(sql: string): Promise<Row[]> {
    const t0 = PROFILE ? performance.now() : 0;
    const reader = await this.conn.runAndReadAll(sql);
    if (PROFILE) profile(sql, t0);
    const rows = reader.getRowObjectsJS() as Row[];
    return rows.map((r) => {
      const o: Row = {};
      for (const [k, v] of Object.entries(r)) o[k] = typeof v === "bigint" ? Number(v) : v;
      return o;
    });
  }

  async one(sql: string): Promise<Row> {
    const rows = await this.all(sql);
    if (rows.length !== 1) throw new Error(`expected one row, got ${rows.length}: ${sql}`);
    return rows[0]!;
  }

  async scalar<T = unknown>(sql: string): Promise<T> {
    const r = await this.one(sql);
    return Object.values(r)[0] as T;
  }

  async columns(table: string): Promise<{ name: string; type: string }[]> {
    const rows = await this.all(`DESCRIBE ${'"' + table.replace(/"/g, '""') + '"'}`);
    return rows.map((r) => ({ name: String(r.column_name), type: String(r.column_type) }));
  }

  /**
   * Switches off the engine's access to files, databases and extensions outside `dirs` (the run's
   * staging and spill folders) and `files` (the inputs, read by views), and locks the
   * configuration, so no SQL can switch it back.
   */
  async sandbox(dirs: string[], files: string[] = []): Promise<void> {
    const q = (x: string) => `'${x.replace(/'/g, "''")}'`;
    await this.conn.run(`SET allowed_directories = [${dirs.map((d) => q(d.endsWith("/") ? d : d + "/")).join(", ")}]`);
    // The input files themselves (a clean Parquet source stays a view over its file; verified unchanged, sources/verify.ts).
    if (files.length) await this.conn.run(`SET allowed_paths = [${files.map(q).join(", ")}]`);
    await this.conn.run("SET enable_external_access = false");
    await this.conn.run("SET lock_configuration = true");
  }

  async version(): Promise<string> {
    return String(await this.scalar("SELECT version()"));
  }

  close(): void {
    try {
      this.conn.closeSync();
    } finally {
      this.instance.closeSync();
    }
  }
}
