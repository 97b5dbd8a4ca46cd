/** Runs a loaded pipeline: sources, steps in order, audits after each, then publishing. */
import { writeFileSync } from "node:fs";
import path from "node:path";
import { createRequire } from "node:module";
import { AuditFailure, CairnError, DataError, PipelineError, exitCodeOf } from "../errors.js";
import { Session, type SessionOptions } from "../engine/session.js";
import { AuditLog, AUDIT_TABLE, type AuditSummary } from "../audit/log.js";
import { initRejects, loadSource, REJECTS_TABLE, type InputFile, type SourceResult } from "../sources/load.js";
import { stepKind } from "../steps/registry.js";
import type { StepContext, TableInfo } from "../steps/types.js";
import type { LoadedPipeline } from "../spec/load.js";
import { writeParquet, type OutputFile } from "../publish/parquet.js";
import { RunDir } from "../publish/rundir.js";
import { Progress } from "./progress.js";
import { setExactSumUnit } from "../engine/sql.js";
import { massFactor } from "../units.js";
import { METHOD_NOTE, CAUTION } from "./method.js";

const require = createRequire(import.meta.url);
export const TOOL_VERSION: string = (require("../../package.json") as { version: string }).version;

export interface RunOptions extends SessionOptions {
  out?: string;
  replace?: boolean;
  progress?: Progress;
  /** Base folder for runs without --out (default: the current directory). */
  cwd?: string;
}

export interface RunReport {
  status: "ok" | "failed";
  exit_code: number;
  error?: string;
  run_dir: string;
  outputs: OutputFile[];
  sources: Omit<SourceResult, "files">[];
  rejects: number;
  audit: AuditSummary | null;
  timings: Record<string, number>;
}

function utcStamp(d: Date): string {
  return d.toISOString().replace(/[-:]/g, "").replace(/\.\d+Z$/, "Z");
}

export function defaultRunDir(lp: LoadedPipeline, cwd = process.cwd(), now = new Date()): string {
  return path.join(cwd, "runs", lp.pipeline.name, utcStamp(now));
}

export async function runPipeline(lp: LoadedPipeline, opts: RunOptions = {}): Promise<RunReport> {
  const progress = opts.progress ?? new Progress(false);
  const started = new Date();
  const out = opts.out ?? defaultRunDir(lp, opts.cwd, started);
  const rd = new RunDir(out);
  for (const m of rd.cleanStale()) progress.info(m);
  if (rd.exists() && !opts.replace) {
    throw new PipelineError(`${out} already exists; pass --replace to swap it for the new run, or choose another --out`);
  }
  rd.create();
  setExactSumUnit(massFactor(lp.pipeline.base_unit, "g"));
  const s = await Session.open({ ...opts, tempDirectory: opts.tempDirectory ?? path.join(rd.staging, ".spill") });
  const audits = new AuditLog(s);
  const timings: Record<string, number> = {};
  const tables = new Map<string, TableInfo>();
  const sources: SourceResult[] = [];
  const inputs: InputFile[] = [];
  let outputs: OutputFile[] = [];
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
    dir: lp.dir,
    outputDir: rd.staging,
    audits,
    progress,
    tables,
    requireTable(name, option) {
      const info = tables.get(name);
      if (!info) throw new PipelineError(`option ${option}: no table ${JSON.stringify(name)}; known: ${[...tables.keys()].join(", ")}`);
      return info;
    },
    async columnsOf(name) {
      return (await s.columns(name)).map((c) => c.name);
    },
  };

  const finish = async (status: "ok" | "failed", err?: unknown): Promise<RunReport> => {
    // Audit table and rejects are always written; tables only on success.
    outputs.push(...(await writeParquet(s, { table: REJECTS_TABLE, name: "rejects", dir: rd.staging, sql: `SELECT * FROM ${REJECTS_TABLE} ORDER BY source, file, "row", line, "column", reason` })));
    outputs.push(...(await writeParquet(s, { table: AUDIT_TABLE, name: "audit", dir: rd.staging, sql: audits.orderedSql() })));
    const summary = await audits.summary();
    const rejects = Number(await s.scalar(`SELECT count(*) FROM ${REJECTS_TABLE}`));
    const code = status === "ok" ? 0 : exitCodeOf(err);
    const manifest = {
      tool: { name: "cairn", version: TOOL_VERSION },
      engine: { duckdb: await s.version(), node: process.version },
      status,
      ...(err ? { error: String((err as Error).message) } : {}),
      started_at: started.toISOString(),
      finished_at: new Date().toISOString(),
      pipeline: { name: lp.pipeline.name, file: lp.file, sha256: lp.sha256, variables: lp.variables, base_unit: lp.pipeline.base_unit },
      method: METHOD_NOTE,
      caution: CAUTION,
      inputs,
      sources: sources.map(({ files: _f, ...r }) => r),
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
    return {
      status, exit_code: code, ...(err ? { error: String((err as Error).message) } : {}), run_dir: dir, outputs,
      sources: sources.map(({ files: _f, ...r }) => r), rejects, audit: summary, timings,
    };
  };

  try {
    await audits.init();
    await initRejects(s);
    for (const [name, src] of Object.entries(lp.pipeline.sources)) {
      progress.info(`source ${name}: loading ${src.path}`);
      let r: SourceResult;
      try {
        r = await t(`source:${name}`, () => loadSource(s, lp.pipeline, name, src, lp.dir, (m) => progress.info(m)));
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
      const keys = [...r.keys.filter((k) => k !== "year"), ...(r.keys.includes("year") ? ["year"] : [])];
      tables.set(name, { name, keys, publish: false });
      progress.info(`source ${name}: ${r.rowsLoaded} rows loaded, ${r.rowsRejected} rejected, ${r.rowsFiltered} filtered out`);
      if (r.rowsRejected > 0) {
        await audits.note(name, "rejected-rows", "warning", "fail", `${r.rowsRejected} of ${r.rowsRead} rows of source ${name} rejected (see rejects.parquet)`, r.rowsRejected, 0);
      }
    }
    for (const [i, step] of lp.pipeline.steps.entries()) {
      const kind = stepKind(step.kind)!;
      audits.setStepIndex(i + 1);
      progress.info(`step ${step.id} (${step.kind}): running`);
      const produced = await t(`step:${step.id}`, () => kind.run(ctx, step as never));
      const pub = step.publish === undefined || step.publish === true ? {} : step.publish === false ? false : step.publish;
      for (const [j, p] of produced.entries()) {
        tables.set(p.name, { ...p, step: step.id, publish: pub === false ? false : j === 0 ? pub : {} });
      }
      if (audits.failedErrors.length > 0) {
        const f = audits.failedErrors;
        throw new AuditFailure(
          `step ${step.id}: ${f.length} audit check(s) of severity error failed:\n` +
            f.map((x) => `  ${x.step} ${x.check}: ${x.failed} item(s) failed, e.g. ${x.example}`).join("\n"),
        );
      }
      progress.info(`step ${step.id}: done in ${timings[`step:${step.id}`]} s`);
    }
    await t("publish", async () => {
      for (const info of tables.values()) {
        if (info.files) {
          outputs.push(...info.files);
          continue;
        }
        if (info.publish === false) continue;
        progress.info(`publishing ${info.name}`);
        outputs.push(...(await writeParquet(s, { table: info.name, keys: info.keys, dir: rd.staging, name: info.name, partitionBy: info.publish.partition_by })));
      }
    });
    return await finish("ok");
  } catch (e) {
    if (!(e instanceof CairnError) && /out of range|Conversion Error/i.test(String((e as Error).message)) && /INT64|BIGINT|round/i.test(String((e as Error).message))) {
      e = new DataError(`a quantity too large to sum exactly (one value above 9.2 × 10^12 t; sums are kept to 1 g): ${String((e as Error).message).split("\n")[0]}`);
    }
    if (e instanceof DataError || e instanceof AuditFailure) {
      try {
        outputs = [];
        return await finish("failed", e);
      } catch (e2) {
        rd.discard();
        throw e2;
      }
    }
    try {
      s.close();
    } catch {
      /* already closed */
    }
    rd.discard();
    if (!(e instanceof CairnError) && e instanceof Error) e.message = `internal error: ${e.message}`;
    throw e;
  }
}
