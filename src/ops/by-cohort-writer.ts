/**
 * Cohort-resolved output, streamed: rows (series × cohort × year) are buffered as typed
 * arrays up to a fixed size, appended to a small DuckDB table, written as one Parquet part
 * file into the run's staging directory, and dropped. Memory stays bounded whatever the
 * number of series; per series-year sums are kept for the audit against the totals.
 */
import { mkdirSync } from "node:fs";
import path from "node:path";
import type { Session } from "../engine/session.js";
import { ident, lit } from "../engine/sql.js";
import { writeColumns } from "../engine/handoff.js";
import { sha256, type OutputFile } from "../publish/parquet.js";
import { renameSync, rmSync, statSync } from "node:fs";

export class ByCohortWriter {
  private readonly cap: number;
  private sid: Int32Array;
  private ci: Int32Array;
  private yi: Int32Array;
  private inflow: Float64Array;
  private outflow: Float64Array;
  private stock: Float64Array;
  private used = 0;
  private part = 0;
  readonly files: OutputFile[] = [];
  /** Σ over cohorts of stock and outflow per series-year (n × T). */
  readonly sumStock: Float64Array;
  readonly sumOutflow: Float64Array;

  constructor(
    private readonly s: Session,
    private readonly table: string,
    private readonly outDir: string,
    private readonly runDir: string,
    private readonly selectKeys: string,
    private readonly sidTable: string,
    private readonly y0: number,
    private readonly unit: string,
    private readonly T: number,
    n: number,
    rowsPerPart = 2_000_000,
  ) {
    this.cap = rowsPerPart;
    this.sid = new Int32Array(this.cap);
    this.ci = new Int32Array(this.cap);
    this.yi = new Int32Array(this.cap);
    this.inflow = new Float64Array(this.cap);
    this.outflow = new Float64Array(this.cap);
    this.stock = new Float64Array(this.cap);
    this.sumStock = new Float64Array(n * T);
    this.sumOutflow = new Float64Array(n * T);
    mkdirSync(outDir, { recursive: true });
  }

  /** Adds one series' cohort-major rows. */
  async add(sid: number, cohort: Int32Array, year: Int32Array, inflow: Float64Array, outflow: Float64Array, stock: Float64Array): Promise<void> {
    const rows = cohort.length;
    if (this.used + rows > this.cap) await this.flush();
    const o = this.used;
    this.sid.fill(sid, o, o + rows);
    this.ci.set(cohort, o);
    this.yi.set(year, o);
    this.inflow.set(inflow, o);
    this.outflow.set(outflow, o);
    this.stock.set(stock, o);
    const base = sid * this.T;
    for (let k = 0; k < rows; k++) {
      this.sumStock[base + year[k]!] += stock[k]!;
      this.sumOutflow[base + year[k]!] += outflow[k]!;
    }
    this.used += rows;
  }

  async flush(): Promise<void> {
    if (this.used === 0) return;
    const tmp = `__${this.table}_part`;
    await writeColumns(this.s, tmp, [
      { name: "sid", kind: "i32", data: this.sid }, { name: "ci", kind: "i32", data: this.ci }, { name: "yi", kind: "i32", data: this.yi },
      { name: "inflow", kind: "f64", data: this.inflow }, { name: "outflow", kind: "f64", data: this.outflow }, { name: "stock", kind: "f64", data: this.stock },
    ], this.used, { keepOrder: false }); // copied out with ORDER BY
    const file = path.join(this.outDir, `part-${String(this.part).padStart(5, "0")}.parquet`);
    await this.s.run(`COPY (SELECT ${this.selectKeys}, CAST(r.ci + ${this.y0} AS BIGINT) AS cohort, CAST(r.yi + ${this.y0} AS BIGINT) AS year,
        r.inflow, r.outflow, r.stock, ${lit(this.unit)} AS unit
      FROM ${ident(tmp)} r JOIN ${ident(this.sidTable)} m USING (sid) ORDER BY r.sid, r.ci, r.yi)
      TO ${lit(file)} (FORMAT parquet, COMPRESSION zstd, ROW_GROUP_SIZE 122880)`);
    await this.s.run(`DROP TABLE ${ident(tmp)}`);
    this.files.push({ table: this.table, file: path.relative(this.runDir, file), rows: this.used, bytes: statSync(file).size, sha256: sha256(file) });
    this.part++;
    this.used = 0;
  }

  /**
   * Publishes the parts: a single part becomes `<table>.parquet`; several stay as the folder
   * `<table>/part-NNNNN.parquet` (concatenating them into one file took a gigabyte more memory
   * in DuckDB, which defeats the streaming).
   */
  async finish(): Promise<OutputFile[]> {
    await this.flush();
    const single = path.join(this.runDir, `${this.table}.parquet`);
    if (this.files.length === 0) {
      await this.s.run(`COPY (SELECT ${this.selectKeys}, CAST(NULL AS BIGINT) AS cohort, CAST(NULL AS BIGINT) AS year, CAST(NULL AS DOUBLE) AS inflow,
          CAST(NULL AS DOUBLE) AS outflow, CAST(NULL AS DOUBLE) AS stock, ${lit(this.unit)} AS unit FROM ${ident(this.sidTable)} m WHERE FALSE)
        TO ${lit(single)} (FORMAT parquet, COMPRESSION zstd)`);
      rmSync(this.outDir, { recursive: true, force: true });
      return [{ table: this.table, file: path.relative(this.runDir, single), rows: 0, bytes: statSync(single).size, sha256: sha256(single) }];
    }
    if (this.files.length === 1) {
      renameSync(path.join(this.runDir, this.files[0]!.file), single);
      rmSync(this.outDir, { recursive: true, force: true });
      return [{ ...this.files[0]!, file: path.relative(this.runDir, single) }];
    }
    const folder = path.join(this.runDir, this.table);
    renameSync(this.outDir, folder);
    return this.files.map((f) => ({ ...f, file: path.join(this.table, path.basename(f.file)) }));
  }
}
