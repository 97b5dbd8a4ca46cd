/**
 * Runs a loaded pipeline: the plan (the same checks as `cairn check`), the sources, the checks
 * of the small tables, the steps in order with their audits, then publishing into the run
 * directory. The runner knows no step kind: each declares its outputs in the plan.
 */
import { writeFileSync } from "node:fs";
import path from "node:path";
import { createRequire } from "node:module";
import { AuditFailure, CairnError, DataError, InputChanged, ResourceError, exitCodeOf, resourceFailure, firstLines } from "../errors.js";
import { Session, type SessionOptions } from "../engine/session.js";
import { Exact, ident, lit } from "../engine/sql.js";
import { AuditLog, AUDIT_TABLE, type AuditSummary } from "../audit/log.js";
import { initRejects, loadSource, REJECTS_TABLE, type InputFile, type SourceResult } from "../sources/load.js";
import type { RunSettings, StepContext, TableInfo } from "../steps/types.js";
import type { LoadedPipeline } from "../spec/load.js";
import { writeParquet, type OutputFile } from "../publish/parquet.js";
import { checkTarget, RunDir } from "../publish/rundir.js";
import { InputWatch } from "../sources/verify.js";
import { fault } from "./fault.js";
import { Progress } from "./progress.js";
import { massFactor } from "../units.js";
import { METHOD_NOTE, CAUTION } from "./method.js";
import { buildPlan, type Plan, type StepNode } from "../plan/build.js";
import { CarryStore } from "../steps/cohort-model/carry.js";

const require = createRequire(import.meta.url);
export const TOOL_VERSION: string = (require("../../package.json") as { version: string }).version;

export interface RunOptions extends SessionOptions {
  out?: string;
  replace?: boolean;
  progress?: Progress;
  /** Base folder for runs without --out (default: the current directory). */
  cwd?: string;
  settings?: Partial<RunSettings>;
}

export type SourceReport = Omit<SourceResult, "files">;

export interface RunReport {
  status: "ok" | "failed";
  exit_code: number;
  error?: string;
  run_dir: string;
  outputs: OutputFile[];
  sources: SourceReport[];
  rejects: number;
  audit: AuditSummary | null;
  timings_s: Record<string, number>;
}

function utcStamp(d: Date): string {
  return d.toISOString().replace(/[-:]/g, "").replace(/\.\d+Z$/, "Z");
}

export function defaultRunDir(lp: LoadedPipeline, cwd = process.cwd(), now = new Date()): string {
  return path.join(cwd, "runs", lp.pipeline.name, utcStamp(now));
}

export function defaultSettings(): RunSettings {
  return { poolMinCells: Number(process.env.CAIRN_POOL_MIN_CELLS ?? 2e8) };
}

const continuesOf = (n: StepNode): string | undefined => (n.step as { continues?: { step: string } }).continues?.step;

/** Steps that a later step continues (they keep their end state in memory). */
function continuedSteps(plan: Plan): Set<string> {
  const out = new Set<string>();
  for (const n of plan.steps) {
    const c = (n.step as { continues?: { step: string } }).continues;
    if (c) out.add(c.step);
  }
  return out;
}

/** Internal table names never reach users: DuckDB's messages name them, so they are replaced. */
export function cleanMessage(m: string): string {
  return m.replace(/"?__[A-Za-z0-9_]+"?/g, "an internal table");
}

export async function runPipeline(lp: LoadedPipeline, opts: RunOptions = {}): Promise<RunReport> {
  const progress = opts.progress ?? new Progress(false);
  const started = new Date();
  // The plan first: a file that is not a valid pipeline stops here (exit 2), before anything is written.
  const plan = await buildPlan(lp);
  const out = opts.out ?? defaultRunDir(lp, opts.cwd, started);
  // The target: never the current folder, an input's folder or anything but an earlier run (exit 2); then its lock (exit 5).
  checkTarget(out, { replace: Boolean(opts.replace), protect: protectedPaths(lp), cwd: opts.cwd });
  const rd = new RunDir(out);
  rd.acquire();
  let s: Session;
  try {
    for (const m of rd.cleanStale()) progress.info(m);
    checkTarget(out, { replace: Boolean(opts.replace), protect: protectedPaths(lp), cwd: opts.cwd }); // again, under the lock
    rd.create();
    s = await Session.open({ ...opts, tempDirectory: opts.tempDirectory ?? path.join(rd.staging, ".spill") });
  } catch (e) {
    rd.discard();
    throw resourceFailure(e, { tempDir: opts.tempDirectory, outDir: out }) ?? e;
  }
  const watch = new InputWatch();
  const resources = { memoryLimit: opts.memoryLimit, tempDir: opts.tempDirectory ?? path.join(rd.staging, ".spill"), outDir: path.resolve(out) };
  const audits = new AuditLog(s, lp.pipeline.base_unit);
  const timings: Record<string, number> = {};
  const tables = new Map<string, TableInfo>();
  const sources: SourceResult[] = [];
  const inputs: InputFile[] = [];
  const streamed = new Map<string, OutputFile[]>();
  let outputs: (OutputFile & { step?: string; role?: string })[] = [];
  const t = async <T>(label: string, f: () => Promise<T>): Promise<T> => {
    const t0 = performance.now();
    try {
      return await f();
    } finally {
      timings[label] = Number(((performance.now() - t0) / 1000).toFixed(3));
    }
  };
  const ctx: StepContext = {
    session: s,
    pipeline: lp.pipeline,
    exact: new Exact(massFactor(lp.pipeline.base_unit, "g")),
    dir: lp.dir,
    outputDir: rd.staging,
    audits,
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
    streamed(name, files) {
      streamed.set(name, files);
    },
    carry: new CarryStore(continuedSteps(plan)),
    settings: { ...defaultSettings(), ...opts.settings },
  };

  const finish = async (status: "ok" | "failed", err?: unknown): Promise<RunReport> => {
    // Audit table and rejects are always written; tables only on success.
    outputs.push(...(await writeParquet(s, { table: REJECTS_TABLE, name: "rejects", dir: rd.staging, sql: `SELECT * FROM ${REJECTS_TABLE} ORDER BY source, file, "row", line, "column", reason` })));
    outputs.push(...(await writeParquet(s, { table: AUDIT_TABLE, name: "audit", dir: rd.staging, sql: audits.orderedSql() })));
    const summary = await audits.summary();
    const rejects = Number(await s.scalar(`SELECT count(*) FROM ${REJECTS_TABLE}`));
    const code = status === "ok" ? 0 : exitCodeOf(err);
    const message = err ? cleanMessage(String((err as Error).message)) : undefined;
    const srcReports = sources.map(({ files: _f, ...r }) => r);
    const manifest = {
      tool: { name: "cairn", version: TOOL_VERSION },
      engine: { duckdb: await s.version(), node: process.version },
      status,
      exit_code: code,
      ...(message ? { error: message } : {}),
      started_at: started.toISOString(),
      finished_at: new Date().toISOString(),
      pipeline: { name: lp.pipeline.name, file: lp.file, sha256: lp.sha256, variables: lp.variables, base_unit: lp.pipeline.base_unit },
      method: METHOD_NOTE,
      caution: CAUTION,
      steps: plan.steps.map((n) => ({
        id: n.id, kind: n.kind.kind, reads: n.reads.map((r) => r.table),
        ...(continuesOf(n) ? { continues: continuesOf(n) } : {}),
        outputs: n.outputs.map((o) => ({ name: o.name, role: o.role, keys: o.keys })),
      })),
      inputs,
      sources: srcReports,
      outputs,
      timings_s: timings,
      rejects,
      audit: summary,
    };
    writeFileSync(path.join(rd.staging, "manifest.json"), JSON.stringify(manifest, null, 2) + "\n");
    s.close();
    let dir = path.resolve(out);
    if (status === "ok") rd.commit(Boolean(opts.replace));
    else dir = rd.fail();
    return { status, exit_code: code, ...(message ? { error: message } : {}), run_dir: dir, outputs, sources: srcReports, rejects, audit: summary, timings_s: timings };
  };

  try {
    await audits.init();
    await initRejects(s);
    await loadSources(ctx, lp, plan, sources, inputs, t, watch);
    // From here on pipeline SQL runs in a sandbox: no file, database or extension outside the run.
    await s.sandbox([rd.staging, resources.tempDir], inputs.map((f) => f.path));
    // The small tables that configure steps, checked before any step runs (the same checks as `cairn check`).
    for (const node of plan.steps) await node.kind.check?.(ctx, node.step as never);
    for (const node of plan.steps) {
      await runStep(ctx, node, t, streamed);
      fault(`after-step:${node.id}`);
      watch.checkStat(`after step ${node.id}`);
      if (audits.failedErrors.length > 0) {
        const f = audits.failedErrors;
        throw new AuditFailure(
          `step ${node.id}: ${f.length} audit check(s) of severity error failed:\n` +
            f.map((x) => `  ${x.step} ${x.check}: ${x.failed} item(s) failed, e.g. ${x.example}`).join("\n"),
        );
      }
      progress.info(`step ${node.id}: done in ${timings[`step:${node.id}`]} s`);
    }
    fault("before-publish");
    await t("verify_inputs", () => watch.verifyHashes());
    await t("publish", async () => {
      for (const info of tables.values()) {
        if (!info.step) continue;
        const role = plan.steps.find((n) => n.id === info.step)!.outputs.find((o) => o.name === info.name)!.role;
        if (info.publish === false) continue;
        if (info.files) {
          outputs.push(...info.files.map((f) => ({ ...f, step: info.step, role })));
          continue;
        }
        progress.info(`publishing ${info.name}`);
        const written = await writeParquet(s, { table: info.name, keys: info.keys, dir: rd.staging, name: info.name, partitionBy: info.publish.partition_by });
        outputs.push(...written.map((f) => ({ ...f, step: info.step, role })));
      }
    });
    return await finish("ok");
  } catch (e) {
    if (!(e instanceof CairnError) && /Type DOUBLE with value .* can't be cast because the value is out of range for the destination type INT64/i.test(String((e as Error).message))) {
      e = new DataError(`a quantity too large to sum exactly (one value above ${ctx.exact.maxValue.toExponential(1)} ${lp.pipeline.base_unit}; sums are kept to 1 g): ${String((e as Error).message).split("\n")[0]}`);
    }
    e = resourceFailure(e, resources) ?? e;
    if (e instanceof DataError || e instanceof AuditFailure || e instanceof ResourceError || e instanceof InputChanged) {
      try {
        outputs = [];
        return await finish("failed", e);
      } catch (e2) {
        try {
          s.close();
        } catch {
          /* already closed */
        }
        rd.discard();
        // A second failure while keeping DIR.failed (a full disk, say) does not hide the first.
        throw e instanceof ResourceError ? e : resourceFailure(e2, resources) ?? e2;
      }
    }
    try {
      s.close();
    } catch {
      /* already closed */
    }
    rd.discard();
    if (!(e instanceof CairnError) && e instanceof Error) e.message = `internal error: ${cleanMessage(firstLines(e.message))}`;
    throw e;
  }
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

async function loadSources(ctx: StepContext, lp: LoadedPipeline, plan: Plan, sources: SourceResult[], inputs: InputFile[],
  t: <T>(label: string, f: () => Promise<T>) => Promise<T>, watch: InputWatch): Promise<void> {
  for (const node of plan.sources) {
    const { name, source: src } = node;
    ctx.progress.info(`source ${name}: loading ${src.path}`);
    let r: SourceResult;
    try {
      r = await t(`source:${name}`, () => loadSource(ctx.session, lp.pipeline, name, src, lp.dir, { log: (m) => ctx.progress.info(m), located: node.config, watch }));
    } catch (e) {
      const partial = (e as { source?: SourceResult }).source;
      if (partial) {
        sources.push(partial);
        inputs.push(...partial.files);
      }
      throw e;
    }
    sources.push(r);
    inputs.push(...r.files);
    fault(`after-source:${name}`);
    ctx.tables.set(name, { name, keys: node.schema.keys, publish: false });
    ctx.progress.info(`source ${name}: ${r.rows_loaded} rows loaded, ${r.rows_rejected} rejected, ${r.rows_filtered} filtered out`);
    await ctx.audits.note(name, "rejected-rows", "warning", r.rows_rejected > 0 ? "fail" : "pass",
      r.rows_rejected > 0 ? `${r.rows_rejected} of ${r.rows_read} rows of source ${name} rejected (see rejects.parquet)` : `${r.rows_read} rows read, none rejected`,
      { items: r.rows_read, failed: r.rows_rejected });
  }
}

async function runStep(ctx: StepContext, node: StepNode, t: <T>(label: string, f: () => Promise<T>) => Promise<T>, streamed: Map<string, OutputFile[]>): Promise<void> {
  const s = ctx.session;
  ctx.audits.setStepIndex(node.index + 1);
  ctx.progress.info(`step ${node.id} (${node.kind.kind}): running`);
  const step = node.step;
  // Small tables produced by earlier steps are checked now that they exist.
  await t(`step:${node.id}`, async () => {
    if (node.reads.some((r) => r.config && ctx.tables.get(r.table)?.step !== undefined)) await node.kind.check?.(ctx, step as never);
    await node.kind.run(ctx, step as never);
  });
  const pub = step.publish === undefined || step.publish === true ? {} : step.publish === false ? false : step.publish;
  for (const o of node.outputs) {
    const files = streamed.get(o.name);
    if (o.streamed) {
      if (!files) throw new Error(`step ${node.id} did not write its declared output ${o.name}`);
      // Later steps read the streamed files as a view.
      await s.run(`CREATE OR REPLACE VIEW ${ident(o.name)} AS SELECT * FROM read_parquet([${files.map((f) => lit(path.join(ctx.outputDir, f.file))).join(", ")}])`);
    }
    const got = await s.columns(o.name).catch(() => null);
    if (!got) throw new Error(`step ${node.id} did not produce its declared table ${o.name}`);
    const want = o.columns.map((c) => `${c.name} ${c.type}`).join(", ");
    const have = got.map((c) => `${c.name} ${c.type}`).join(", ");
    if (want !== have) throw new Error(`step ${node.id}: table ${o.name} has columns (${have}); the plan declared (${want})`);
    ctx.tables.set(o.name, { name: o.name, keys: o.keys, step: node.id, publish: pub === false ? false : o.role === "main" ? pub : {}, ...(files ? { files } : {}) });
  }
}
