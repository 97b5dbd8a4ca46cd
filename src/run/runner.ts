/**
 * Runs a loaded pipeline: the plan (the same checks as `cairn check`), the target and its lock,
 * the inputs hashed and fingerprinted, the steps that can be taken from a previous run, the
 * sources the others need, the checks of the small tables, the steps in order with their
 * audits, revisions against the previous release, then publishing into the run directory (and,
 * for a release, the catalog's index). The runner knows no step kind: each declares its outputs.
 */
import { statSync, writeFileSync } from "node:fs";
import path from "node:path";
import { createRequire } from "node:module";
import { AuditFailure, CairnError, DataError, InputChanged, PipelineError, ResourceError, exitCodeOf, resourceFailure, firstLines } from "../errors.js";
import { Session, type SessionOptions } from "../engine/session.js";
import { Exact } from "../engine/sql.js";
import { AuditLog, AUDIT_TABLE, type AuditSummary } from "../audit/log.js";
import { initRejects, REJECTS_TABLE, sourceFiles, type InputFile, type SourceResult } from "../sources/load.js";
import type { RunSettings, StepContext, TableInfo } from "../steps/types.js";
import type { LoadedPipeline } from "../spec/load.js";
import { writeParquet, type OutputFile } from "../publish/parquet.js";
import { writeArrow, writeCsv } from "../publish/arrow.js";
import { describeTable, parquetMetadata, tableUnits, type DictTable } from "../publish/dictionary.js";
import { exporterFor } from "../publish/exporters.js";
import { sha256 } from "../publish/parquet.js";
import { checkTarget, RunDir } from "../publish/rundir.js";
import { InputWatch } from "../sources/verify.js";
import { Progress } from "./progress.js";
import { massFactor } from "../units.js";
import { METHOD_NOTE, CAUTION } from "./method.js";
import { buildPlan, type Plan, type StepNode } from "../plan/build.js";
import { fingerprints, type NodePrint } from "../plan/fingerprint.js";
import { CarryStore } from "../steps/cohort-model/carry.js";
import { Catalog, type ReleaseEntry } from "../publish/catalog.js";
import { readPrevious, reusableSteps, type PreviousRun } from "./reuse.js";
import { loadSources, reuseStep, runStep } from "./steps.js";
import { newestDataYear, publishRevisions } from "./revise.js";
import { reportText } from "./report-text.js";
import { renderReport } from "../report/report.js";
import { planShards, type ShardPlan } from "../plan/shard.js";
import { planFingerprint } from "../plan/fingerprint.js";
import { afterShardStep, cutSources, ITEMS_FILE, ShardAuditLog, type ShardSpec } from "./shard.js";
import { checkBoth, mergeManifest, takeStep, type MergeSpec } from "./merge.js";

const require = createRequire(import.meta.url);
export const TOOL_VERSION: string = (require("../../package.json") as { version: string }).version;

export interface RunOptions extends SessionOptions {
  out?: string;
  replace?: boolean;
  progress?: Progress;
  /** Base folder for runs without --out (default: the current directory). */
  cwd?: string;
  settings?: Partial<RunSettings>;
  /** Publish as release ID into the catalog (`catalog` option, or the pipeline file's `catalog:`). */
  release?: string;
  catalog?: string;
  /** Mark the release provisional (exports give OBS_STATUS P). */
  provisional?: boolean;
  /** A run directory to compare with (revisions), instead of the catalog's latest release. */
  against?: string;
  /** A run directory whose unchanged steps are taken over (default: the previous release). */
  reuseFrom?: string;
  /** Take over unchanged steps (default true when a previous run is known). */
  reuse?: boolean;
  /** Write report.html into the run directory (default true). */
  report?: boolean;
  /** Run one shard of a sharded run: the steps the shard plan places in the shards, on the shard's keys. */
  shard?: ShardSpec;
  /** Internal (cairn merge): merge these shard run directories into one run. */
  merge?: MergeSpec;
}

export type SourceReport = Omit<SourceResult, "files"> & { fingerprint?: string; method_fingerprint?: string; reused?: boolean };

export interface RunReport {
  status: "ok" | "failed";
  exit_code: number;
  error?: string;
  run_dir: string;
  release?: string;
  outputs: OutputFile[];
  sources: SourceReport[];
  reused: string[];
  revisions: { table: string; rows: number }[];
  rejects: number;
  audit: AuditSummary | null;
  timings_s: Record<string, number>;
  /** The HTML report written into the run directory (relative path), unless turned off. */
  report?: string;
  /** A shard's place in a sharded run. */
  shard?: { index: number; count: number; by: string; keys: number; of: number };
  /** A merge: the shard run directories it was made from. */
  merged_from?: string[];
}

function utcStamp(d: Date): string {
  return d.toISOString().replace(/[-:]/g, "").replace(/\.\d+Z$/, "Z");
}

export function defaultRunDir(lp: LoadedPipeline, cwd = process.cwd(), now = new Date()): string {
  return path.join(cwd, "runs", lp.pipeline.name, utcStamp(now));
}

export function defaultSettings(): RunSettings {
  const v = process.env.CAIRN_POOL_MIN_CELLS;
  if (v !== undefined && !(Number(v) >= 0)) throw new PipelineError(`CAIRN_POOL_MIN_CELLS=${JSON.stringify(v)}: expected a number of cells ≥ 0`);
  return { poolMinCells: Number(v ?? 2e8) };
}

export const continuesOf = (n: StepNode): string | undefined => (n.step as { continues?: { step: string } }).continues?.step;

/** Internal table names never reach users: DuckDB's messages name them, so they are replaced. */
export function cleanMessage(m: string): string {
  return m.replace(/"?__[A-Za-z0-9_]+"?/g, "an internal table");
}

/** Paths a run must never replace: the pipeline file's folder and every input (the fixed part of each source path). */
export function protectedPaths(lp: LoadedPipeline): string[] {
  const out = [lp.dir];
  for (const src of Object.values(lp.pipeline.sources)) {
    const abs = path.resolve(lp.dir, src.path);
    const glob = abs.search(/[*?[{]/);
    out.push(glob >= 0 ? path.dirname(abs.slice(0, glob) + "x") : abs);
  }
  return out;
}

/** The catalog of a run: --catalog, else the pipeline file's `catalog:` (relative to it). */
export function catalogOf(lp: LoadedPipeline, opts: RunOptions): Catalog | null {
  const dir = opts.catalog ?? (lp.pipeline.catalog ? path.resolve(lp.dir, lp.pipeline.catalog) : undefined);
  if (opts.release && !dir) throw new PipelineError(`--release ${opts.release}: no catalog; give --catalog DIR or catalog: in the pipeline file`);
  return opts.release && dir ? new Catalog(dir) : null;
}

/** Hashes every input file (for the fingerprints and the manifest) before anything is read. */
export async function hashInputs(s: Session, lp: LoadedPipeline, plan: Plan, watch: InputWatch): Promise<Map<string, string[]>> {
  const hashes = new Map<string, string[]>();
  for (const node of plan.sources) {
    const { files } = await sourceFiles(s, node.name, node.source, lp.dir);
    const h = await watch.record(node.name, files);
    hashes.set(node.name, files.map((f) => h.get(f)!.sha256));
  }
  return hashes;
}

export async function runPipeline(lp: LoadedPipeline, opts: RunOptions = {}): Promise<RunReport> {
  const progress = opts.progress ?? new Progress(false);
  const started = new Date();
  // The plan first: a file that is not a valid pipeline stops here (exit 2), before anything is written.
  const plan = await buildPlan(lp);
  if (opts.shard && (opts.release || opts.against || opts.reuseFrom)) {
    throw new PipelineError(`--shard: a shard is one part of a run, not a release; --release, --against and --reuse-from belong to the merge (cairn merge … --release ID)`);
  }
  const sp = opts.shard ? await planShards(plan, opts.shard.by) : opts.merge?.sp ?? null;
  const catalog = catalogOf(lp, opts);
  if (opts.release) Catalog.checkId(opts.release);
  if (opts.release && opts.out) throw new PipelineError("--out and --release: a release is written to its catalog as <catalog>/<release id>; give one of them");
  const out = catalog ? path.join(catalog.dir, opts.release!) : opts.out ?? defaultRunDir(lp, opts.cwd, started) + (opts.shard ? `-shard-${opts.shard.index}-of-${opts.shard.count}` : "");
  // A merge never writes into one of its shards' run directories.
  const protect = [...protectedPaths(lp), ...(opts.merge?.shards.map((x) => x.dir) ?? [])];
  // One refresh of a catalog at a time (exit 5), then the target: never the current folder, an input's folder or anything but an earlier run (exit 2), and its lock (exit 5).
  catalog?.acquire();
  const rd = new RunDir(out);
  let s: Session;
  let previous: PreviousRun | null;
  try {
    checkTarget(out, { replace: Boolean(opts.replace), protect, cwd: opts.cwd });
    rd.acquire();
    try {
      for (const m of rd.cleanStale()) progress.info(m);
      catalog?.cleanTemporaries();
      checkTarget(out, { replace: Boolean(opts.replace), protect, cwd: opts.cwd }); // again, under the lock
      previous = readPrevious(opts.against ?? previousRelease(catalog, opts.release));
      rd.create();
      s = await Session.open({ ...opts, tempDirectory: opts.tempDirectory ?? path.join(rd.staging, ".spill") });
    } catch (e) {
      rd.discard();
      throw resourceFailure(e, { tempDir: opts.tempDirectory, outDir: out }) ?? e;
    }
  } catch (e) {
    catalog?.release();
    throw e;
  }
  const run = new Run(lp, plan, opts, s, rd, progress, started, catalog, previous, sp);
  try {
    return await run.execute();
  } finally {
    catalog?.release();
  }
}

/** The latest release other than `id` (replacing a release compares with the one before it). */
function previousRelease(catalog: Catalog | null, id?: string): string | null {
  if (!catalog) return null;
  const idx = catalog.read();
  const others = idx.releases.filter((r) => r.id !== id);
  const latest = idx.latest && idx.latest !== id ? idx.latest : others.length ? others[others.length - 1]!.id : null;
  return latest ? path.join(catalog.dir, latest) : null;
}

/** One run: its state, and the stages of `execute`. */
export class Run {
  readonly watch = new InputWatch();
  readonly audits: AuditLog;
  readonly timings: Record<string, number> = {};
  readonly sources: SourceReport[] = [];
  readonly inputs: InputFile[] = [];
  readonly streamed = new Map<string, OutputFile[]>();
  outputs: (OutputFile & { step?: string; role?: string })[] = [];
  prints = new Map<string, NodePrint>();
  reused = new Set<string>();
  revisionCounts: { table: string; rows: number }[] = [];
  readonly ctx: StepContext;
  readonly resources: { memoryLimit?: string; tempDir: string; outDir: string };
  /** A shard's key values: all of them (sorted), and the shard's own block. */
  shardKeys: { all: string[]; own: string[] } | null = null;

  constructor(readonly lp: LoadedPipeline, readonly plan: Plan, readonly opts: RunOptions, readonly s: Session, readonly rd: RunDir,
    readonly progress: Progress, readonly started: Date, readonly catalog: Catalog | null, readonly previous: PreviousRun | null,
    readonly sp: ShardPlan | null = null) {
    this.audits = opts.shard ? new ShardAuditLog(s, lp.pipeline.base_unit, opts.shard.by) : new AuditLog(s, lp.pipeline.base_unit);
    this.resources = { memoryLimit: opts.memoryLimit, tempDir: opts.tempDirectory ?? path.join(rd.staging, ".spill"), outDir: path.resolve(rd.target) };
    const tables = new Map<string, TableInfo>();
    const continued = new Set(plan.steps.map(continuesOf).filter((x): x is string => Boolean(x)));
    this.ctx = {
      session: s,
      pipeline: lp.pipeline,
      exact: new Exact(massFactor(lp.pipeline.base_unit, "g")),
      dir: lp.dir,
      outputDir: rd.staging,
      audits: this.audits,
      progress,
      tables,
      requireTable(name, option) {
        const info = tables.get(name);
        if (!info) throw new Error(`option ${option}: no table ${JSON.stringify(name)} (the plan should have refused this)`);
        return info;
      },
      async columnsOf(name) {
        return (await s.columns(name)).map((c) => c.name);
      },
      streamed: (name, files) => this.streamed.set(name, files),
      carry: new CarryStore(continued),
      settings: { ...defaultSettings(), ...opts.settings },
    };
  }

  async time<T>(label: string, f: () => Promise<T>): Promise<T> {
    const t0 = performance.now();
    try {
      return await f();
    } finally {
      this.timings[label] = Number(((performance.now() - t0) / 1000).toFixed(3));
    }
  }

  /** single: an ordinary run; shard: one shard of a sharded run; merge: the shards merged. */
  get mode(): "single" | "shard" | "merge" {
    return this.opts.shard ? "shard" : this.opts.merge ? "merge" : "single";
  }

  /** Where the shard plan places a step (null outside sharded runs). */
  placement(id: string): "shards" | "both" | "merge" | null {
    return this.sp?.steps.find((x) => x.id === id)?.placement ?? null;
  }

  /** Steps this run does not compute: in a shard, those at the merge; at the merge, those taken from the shards. */
  skips(id: string): boolean {
    const p = this.placement(id);
    return (this.mode === "shard" && p === "merge") || (this.mode === "merge" && p === "shards");
  }

  async execute(): Promise<RunReport> {
    const { s, plan } = this;
    try {
      await this.audits.init();
      await initRejects(s);
      const hashes = await this.time("hash_inputs", () => hashInputs(s, this.lp, plan, this.watch));
      this.prints = fingerprints(plan, TOOL_VERSION, hashes);
      this.opts.merge?.checkPlan(plan, this.prints, planFingerprint(plan, this.prints));
      if (this.mode !== "single") {
        // No re-use in sharded runs: a shard's steps are taken over by the merge, not from a previous run.
      } else if (this.previous && this.opts.reuse !== false) {
        const from = this.opts.reuseFrom ? readPrevious(this.opts.reuseFrom) : this.previous;
        if (from) this.reused = reusableSteps(plan, this.prints, from);
      } else if (this.opts.reuseFrom && this.opts.reuse !== false) {
        const from = readPrevious(this.opts.reuseFrom);
        if (from) this.reused = reusableSteps(plan, this.prints, from);
      }
      if (this.reused.size) this.progress.info(`re-used unchanged: ${[...this.reused].join(", ")}`);
      await loadSources(this);
      if (this.opts.shard) this.shardKeys = await this.time("shard_keys", () => cutSources(this, this.sp!, this.opts.shard!));
      // From here on pipeline SQL runs in a sandbox: no file, database or extension outside the run.
      const reuseDir = this.reuseSource()?.dir;
      await s.sandbox([this.rd.staging, this.resources.tempDir, ...(this.previous ? [this.previous.dir] : []), ...(reuseDir ? [reuseDir] : []),
        ...(this.opts.merge?.shards.map((x) => x.dir) ?? [])], this.inputs.map((f) => f.path));
      // The small tables that configure steps, checked before any step runs (the same checks as `cairn check`).
      for (const node of plan.steps) if (!this.reused.has(node.id) && !this.skips(node.id)) await node.kind.check?.(this.ctx, node.step as never);
      for (const node of plan.steps) {
        // A shard with no keys (more shards than key values) computes nothing; the merge passes it by.
        if (this.mode === "shard" && (this.skips(node.id) || this.shardKeys?.own.length === 0)) continue;
        if (this.reused.has(node.id)) await reuseStep(this, node);
        else if (this.skips(node.id)) await takeStep(this, node);
        else await runStep(this, node);
        if (this.opts.shard) await afterShardStep(this, node, this.sp!.steps.find((x) => x.id === node.id)!, this.opts.shard);
        if (this.mode === "merge" && this.placement(node.id) === "both") await checkBoth(this, node);
        this.watch.checkStat(`after step ${node.id}`);
        if (this.audits.failedErrors.length > 0) {
          const f = this.audits.failedErrors;
          throw new AuditFailure(`step ${node.id}: ${f.length} audit check(s) of severity error failed:\n` +
            f.map((x) => `  ${x.step} ${x.check}: ${x.failed} item(s) failed, e.g. ${x.example}`).join("\n"));
        }
        this.progress.info(`step ${node.id}: done in ${this.timings[`step:${node.id}`]} s`);
      }
      const { fault } = await import("./fault.js");
      fault("before-publish", this.opts.shard?.index);
      await this.time("verify_inputs", () => this.watch.verifyHashes());
      if (this.previous) await this.time("revisions", () => publishRevisions(this));
      await this.time("publish", () => (this.opts.shard ? this.publishShard() : this.publish()));
      return await this.finish("ok");
    } catch (e) {
      return this.fail(e);
    }
  }

  reuseSource(): PreviousRun | null {
    return this.opts.reuseFrom ? readPrevious(this.opts.reuseFrom) : this.previous;
  }

  /** A shard publishes its steps' tables as plain Parquet files (the merge writes partitions, copies and exports), and its captured audit items. */
  private async publishShard(): Promise<void> {
    for (const info of this.ctx.tables.values()) {
      if (!info.step) continue; // every table, published or not: the merge takes them over
      const node = this.plan.steps.find((n) => n.id === info.step)!;
      const role = node.outputs.find((o) => o.name === info.name)!.role;
      if (info.files) {
        this.outputs.push(...info.files.map((f) => ({ ...f, step: info.step, role })));
        continue;
      }
      const written = await writeParquet(this.s, { table: info.name, keys: info.keys, dir: this.rd.staging, name: info.name });
      this.outputs.push(...written.map((f) => ({ ...f, step: info.step, role })));
    }
  }

  private async publish(): Promise<void> {
    const dictionary: DictTable[] = [];
    for (const info of this.ctx.tables.values()) {
      if (!info.step) continue;
      const node = this.plan.steps.find((n) => n.id === info.step)!;
      const decl = node.outputs.find((o) => o.name === info.name)!;
      const role = decl.role;
      if (info.publish === false) continue;
      if (info.files) {
        this.outputs.push(...info.files.map((f) => ({ ...f, step: info.step, role })));
      } else {
      this.progress.info(`publishing ${info.name}`);
      const metadata = parquetMetadata(decl, await tableUnits(this.s, info.name, decl), CAUTION);
      const written = await writeParquet(this.s, { table: info.name, keys: info.keys, dir: this.rd.staging, name: info.name, partitionBy: info.publish.partition_by, metadata });
      this.outputs.push(...written.map((f) => ({ ...f, step: info.step, role })));
      for (const fmt of info.publish.formats ?? []) {
        this.progress.info(`publishing ${info.name} as ${fmt}`);
        const file = path.join(this.rd.staging, `${info.name}.${fmt}`);
        const w = fmt === "arrow" ? await writeArrow(this.s, info.name, info.keys, file) : await writeCsv(this.s, info.name, info.keys, file);
        this.outputs.push({ ...w, format: fmt, step: info.step, role });
      }
      }
      const files = this.outputs.filter((o) => o.table === info.name);
      dictionary.push(await describeTable(this.s, this.lp.pipeline, decl, { step: node.id, kind: node.kind.kind, files: files.map((f) => f.file), rows: files.filter((f) => (f.format ?? "parquet") === "parquet").reduce((a, f) => a + f.rows, 0) }));
    }
    const dictFile = path.join(this.rd.staging, "dictionary.json");
    writeFileSync(dictFile, JSON.stringify({ pipeline: this.lp.pipeline.name, caution: CAUTION, tables: dictionary }, null, 2) + "\n");
    this.outputs.push({ table: "dictionary", format: "json", file: "dictionary.json", rows: dictionary.length, bytes: statSync(dictFile).size, sha256: sha256(dictFile) });
    await this.exports();
  }

  /** Files for statistical offices (exports:), made from the published tables. */
  private async exports(): Promise<void> {
    const newest = await newestDataYear(this);
    for (const e of this.lp.pipeline.exports ?? []) {
      const x = exporterFor(e.format);
      this.progress.info(`exporting ${e.table} as ${e.format} (${x.label(e)})`);
      const node = this.plan.steps.find((n) => n.id === this.plan.producer.get(e.table))!;
      const columns = node.outputs.find((o) => o.name === e.table)!.columns.map((c) => c.name);
      const f = await x.write(e, {
        session: this.s, dir: this.rd.staging, baseUnit: this.lp.pipeline.base_unit, modelled: ["cohort-model", "yearly-path"].includes(node.kind.kind),
        newestDataYear: newest, provisional: Boolean(this.opts.provisional), replaces: Boolean(this.catalog && this.previous), columns,
      });
      this.outputs.push({ ...f, step: node.id, role: "export" });
    }
  }

  private manifest(status: "ok" | "failed", code: number, message: string | undefined, summary: AuditSummary, rejects: number, engine: string) {
    const { lp, plan } = this;
    return {
      tool: { name: "cairn", version: TOOL_VERSION },
      engine: { duckdb: engine, node: process.version },
      status,
      exit_code: code,
      ...(message ? { error: message } : {}),
      started_at: this.started.toISOString(),
      finished_at: new Date().toISOString(),
      pipeline: { name: lp.pipeline.name, file: lp.file, sha256: lp.sha256, variables: lp.variables, base_unit: lp.pipeline.base_unit },
      ...(this.opts.release ? { release: { id: this.opts.release, catalog: this.catalog!.dir, provisional: Boolean(this.opts.provisional) } } : {}),
      previous: this.previous ? { dir: this.previous.dir, reused_from: this.reused.size ? this.reuseSource()?.dir ?? null : null } : null,
      method: METHOD_NOTE,
      caution: CAUTION,
      steps: plan.steps.map((n) => ({
        id: n.id, kind: n.kind.kind, reads: n.reads.map((r) => r.table),
        ...(continuesOf(n) ? { continues: continuesOf(n) } : {}),
        fingerprint: this.prints.get(n.id)?.fingerprint, method_fingerprint: this.prints.get(n.id)?.method, options_fingerprint: this.prints.get(n.id)?.options,
        reused: this.reused.has(n.id),
        ...(this.sp ? { placement: this.placement(n.id) } : {}),
        outputs: n.outputs.map((o) => ({ name: o.name, role: o.role, keys: o.keys })),
      })),
      inputs: this.watch.files().map((f) => ({ ...f, rows: this.inputs.find((i) => i.path === f.path)?.rows ?? null })),
      sources: this.sources.map((r) => ({ ...r, fingerprint: this.prints.get(r.name)?.fingerprint, method_fingerprint: this.prints.get(r.name)?.method })),
      outputs: this.outputs,
      ...(this.opts.shard ? {
        shard: {
          index: this.opts.shard.index, count: this.opts.shard.count, by: this.opts.shard.by,
          plan_fingerprint: planFingerprint(plan, this.prints),
          keys: this.shardKeys?.own ?? [], all_keys: this.shardKeys?.all ?? [],
          placement: Object.fromEntries(this.sp!.steps.map((x) => [x.id, x.placement])),
          audit_checks: (this.audits as ShardAuditLog).meta,
        },
      } : {}),
      ...(this.opts.merge ? {
        merged: {
          by: this.sp!.by, count: this.opts.merge.shards.length, plan_fingerprint: planFingerprint(plan, this.prints), shards: mergeManifest(this),
          placement: Object.fromEntries(this.sp!.steps.map((x) => [x.id, x.placement])),
        },
      } : {}),
      revisions: this.revisionCounts,
      timings_s: this.timings,
      rejects,
      audit: summary,
    };
  }

  async finish(status: "ok" | "failed", err?: unknown): Promise<RunReport> {
    const { s, rd } = this;
    // Audit table and rejects are always written; tables only on success.
    this.outputs.push(...(await writeParquet(s, { table: REJECTS_TABLE, name: "rejects", dir: rd.staging, sql: `SELECT * FROM ${REJECTS_TABLE} ORDER BY source, file, "row", line, "column", reason` })));
    this.outputs.push(...(await writeParquet(s, { table: AUDIT_TABLE, name: "audit", dir: rd.staging, sql: this.audits.orderedSql() })));
    if (this.audits instanceof ShardAuditLog) this.outputs.push(...(await writeParquet(s, { table: ITEMS_FILE, name: ITEMS_FILE, dir: rd.staging, sql: this.audits.itemsSql() })));
    const summary = await this.audits.summary();
    const rejects = Number(await s.scalar(`SELECT count(*) FROM ${REJECTS_TABLE}`));
    const code = status === "ok" ? 0 : exitCodeOf(err);
    const message = err ? cleanMessage(String((err as Error).message)) : undefined;
    const engine = await s.version();
    const manifest = this.manifest(status, code, message, summary, rejects, engine);
    writeFileSync(path.join(rd.staging, "manifest.json"), JSON.stringify(manifest, null, 2) + "\n");
    s.close();
    if (this.opts.report !== false && !this.opts.shard) await this.writeReport(status);
    const report: RunReport = {
      status, exit_code: code, ...(message ? { error: message } : {}), run_dir: path.resolve(rd.target),
      ...(this.opts.release ? { release: this.opts.release } : {}), outputs: this.outputs,
      sources: manifest.sources, reused: [...this.reused], revisions: this.revisionCounts, rejects, audit: summary, timings_s: this.timings,
      ...(this.opts.report !== false && !this.opts.shard ? { report: "report.html" } : {}),
      ...(this.opts.shard ? { shard: { index: this.opts.shard.index, count: this.opts.shard.count, by: this.opts.shard.by, keys: this.shardKeys?.own.length ?? 0, of: this.shardKeys?.all.length ?? 0 } } : {}),
      ...(this.opts.merge ? { merged_from: this.opts.merge.shards.map((x) => x.dir) } : {}),
    };
    const failedDir = path.resolve(rd.target) + ".failed";
    writeFileSync(path.join(rd.staging, "run.log"), this.progress.log() + "\n" + reportText({ ...report, run_dir: status === "ok" ? report.run_dir : failedDir }));
    if (status === "ok") {
      rd.commit(Boolean(this.opts.replace));
      if (this.catalog) this.catalog.publish(this.releaseEntry(manifest, summary, engine));
    } else report.run_dir = rd.fail();
    return report;
  }

  /** report.html, rendered from the staging directory's manifest and Parquet files before the swap. */
  private async writeReport(status: "ok" | "failed"): Promise<void> {
    const t0 = performance.now();
    this.progress.info("writing report.html");
    const target = path.resolve(this.rd.target) + (status === "ok" ? "" : ".failed");
    const html = await renderReport(this.rd.staging, { displayDir: target, progress: (m) => this.progress.info(`report: ${m}`) });
    writeFileSync(path.join(this.rd.staging, "report.html"), html);
    this.timings.report = Number(((performance.now() - t0) / 1000).toFixed(3));
  }

  private releaseEntry(m: ReturnType<Run["manifest"]>, summary: AuditSummary, engine: string): ReleaseEntry {
    return {
      id: this.opts.release!, started_at: m.started_at, finished_at: m.finished_at, status: "published",
      audit: { errors: summary.errors, warnings: summary.warnings },
      pipeline: { name: this.lp.pipeline.name, sha256: this.lp.sha256, file: this.lp.file },
      tool_version: TOOL_VERSION, engine,
      inputs: this.watch.files(),
      previous: this.previous ? path.basename(this.previous.dir) : null,
      reused: [...this.reused], provisional: Boolean(this.opts.provisional),
    };
  }

  private async fail(err: unknown): Promise<RunReport> {
    let e = err;
    if (!(e instanceof CairnError) && /Type DOUBLE with value .* can't be cast because the value is out of range for the destination type INT64/i.test(String((e as Error).message))) {
      e = new DataError(`a quantity too large to sum exactly (one value above ${this.ctx.exact.maxValue.toExponential(1)} ${this.lp.pipeline.base_unit}; sums are kept to 1 g): ${String((e as Error).message).split("\n")[0]}`);
    }
    e = resourceFailure(e, this.resources) ?? e;
    if (e instanceof DataError || e instanceof AuditFailure || e instanceof ResourceError || e instanceof InputChanged) {
      try {
        this.outputs = [];
        return await this.finish("failed", e);
      } catch (e2) {
        try {
          this.s.close();
        } catch {
          /* already closed */
        }
        this.rd.discard();
        // A second failure while keeping DIR.failed (a full disk, say) does not hide the first.
        throw e instanceof ResourceError ? e : resourceFailure(e2, this.resources) ?? e2;
      }
    }
    try {
      this.s.close();
    } catch {
      /* already closed */
    }
    this.rd.discard();
    if (!(e instanceof CairnError) && e instanceof Error) e.message = `internal error: ${cleanMessage(firstLines(e.message))}`;
    throw e;
  }
}
