/** The run's stages over sources and steps: loading, computing, or taking a step over from a previous run. */
import { linkSync, copyFileSync, mkdirSync } from "node:fs";
import path from "node:path";
import { ident, lit } from "../engine/sql.js";
import { loadSource, type SourceResult } from "../sources/load.js";
import type { StepNode } from "../plan/build.js";
import { fault } from "./fault.js";
import { takeAudit, takeFiles, takeRejects, viewOver } from "./reuse.js";
import type { Run } from "./runner.js";
import { takeSource } from "./merge.js";
import { sha256, writeParquet } from "../publish/parquet.js";

/**
 * Loads the sources that computed steps read; the others (read only by re-used steps) are taken
 * over. A shard loads only the sources its steps read; a merge takes those read only by the
 * shards' steps from the shards (their report, audit rows and rejects: every shard loaded them
 * whole), except for a release, which keeps a copy of every input.
 */
export async function loadSources(run: Run): Promise<void> {
  const { ctx, plan, lp } = run;
  const readByStep = new Set(plan.steps.flatMap((n) => n.reads.map((r) => r.table)));
  const needed = new Set([...plan.steps.filter((n) => !run.reused.has(n.id) && !run.skips(n.id)).flatMap((n) => n.reads.map((r) => r.table)),
    ...(run.mode === "shard" ? [] : plan.extraReads)]);
  const from = run.reuseSource();
  for (const node of plan.sources) {
    const { name, source: src } = node;
    if (run.mode === "shard" && !needed.has(name)) continue;
    if (run.mode === "merge" && !needed.has(name) && readByStep.has(name) && !run.catalog) {
      await takeSource(run, node);
      continue;
    }
    if (!needed.has(name) && from) {
      const prev = from.manifest.sources?.find((x) => x.name === name && x.fingerprint === run.prints.get(name)?.fingerprint);
      if (prev) {
        run.sources.push({ ...(prev as unknown as SourceResult), reused: true });
        await takeAudit(ctx.session, from, name, 0);
        await takeRejects(ctx.session, from, name);
        ctx.progress.info(`source ${name}: unchanged and read only by re-used steps; not loaded`);
        continue;
      }
    }
    ctx.progress.info(`source ${name}: loading ${src.path}`);
    let r: SourceResult;
    try {
      r = await run.time(`source:${name}`, () => loadSource(ctx.session, lp.pipeline, name, src, lp.dir, { log: (m) => ctx.progress.info(m), located: node.config, watch: run.watch }));
    } catch (e) {
      const partial = (e as { source?: SourceResult }).source;
      if (partial) {
        run.sources.push(withoutFiles(partial));
        run.inputs.push(...partial.files);
      }
      throw e;
    }
    run.sources.push(withoutFiles(r));
    run.inputs.push(...r.files);
    fault(`after-source:${name}`, run.opts.shard?.index);
    ctx.tables.set(name, { name, keys: node.schema.keys, publish: false });
    ctx.progress.info(`source ${name}: ${r.rows_loaded} rows loaded, ${r.rows_rejected} rejected, ${r.rows_filtered} filtered out`);
    await ctx.audits.note(name, "rejected-rows", "warning", r.rows_rejected > 0 ? "fail" : "pass",
      r.rows_rejected > 0 ? `${r.rows_rejected} of ${r.rows_read} rows of source ${name} rejected (see rejects.parquet)` : `${r.rows_read} rows read, none rejected`,
      { items: r.rows_read, failed: r.rows_rejected });
  }
  // A release keeps a copy of its inputs as read, for the next release's input changes.
  if (run.catalog) {
    for (const node of plan.sources) {
      if (ctx.tables.has(node.name)) {
        const written = await writeParquet(ctx.session, { table: node.name, sql: `SELECT * FROM ${ident(node.name)}`, dir: run.rd.staging, name: `inputs/${node.name}` });
        run.outputs.push(...written.map((f) => ({ ...f, table: `inputs:${node.name}`, role: "input" })));
      } else if (from) {
        const prev = from.manifest.outputs.filter((o) => o.table === `inputs:${node.name}`);
        for (const f of prev) {
          const to = path.join(run.rd.staging, f.file);
          mkdirSync(path.dirname(to), { recursive: true });
          try {
            linkSync(path.join(from.dir, f.file), to);
          } catch {
            copyFileSync(path.join(from.dir, f.file), to);
          }
          run.outputs.push({ table: f.table, file: f.file, rows: f.rows, bytes: f.bytes, sha256: sha256(to), role: "input" });
        }
      }
    }
  }
}

const withoutFiles = ({ files: _f, ...r }: SourceResult) => r;

export async function runStep(run: Run, node: StepNode): Promise<void> {
  const { ctx } = run;
  const s = ctx.session;
  ctx.audits.setStepIndex(node.index + 1);
  ctx.progress.info(`step ${node.id} (${node.kind.kind}): running`);
  const step = node.step;
  await run.time(`step:${node.id}`, async () => {
    // Small tables produced by earlier steps are checked now that they exist.
    if (node.reads.some((r) => r.config && ctx.tables.get(r.table)?.step !== undefined)) await node.kind.check?.(ctx, step as never);
    await node.kind.run(ctx, step as never);
  });
  fault(`after-step:${node.id}`, run.opts.shard?.index);
  const pub = step.publish === undefined || step.publish === true ? {} : step.publish === false ? false : step.publish;
  for (const o of node.outputs) {
    const files = run.streamed.get(o.name);
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

/** A step taken over from the previous run: its files linked in, read by later steps as views, its audit rows copied. */
export async function reuseStep(run: Run, node: StepNode): Promise<void> {
  const { ctx } = run;
  const from = run.reuseSource()!;
  ctx.audits.setStepIndex(node.index + 1);
  await run.time(`step:${node.id}`, async () => {
    const files = takeFiles(from, node.outputs.map((o) => o.name), run.rd.staging);
    for (const o of node.outputs) {
      const mine = files.filter((f) => f.table === o.name).map((f) => ({ table: f.table, file: f.file, rows: f.rows, bytes: f.bytes, sha256: f.sha256, ...(f.format ? { format: f.format } : {}) }));
      await viewOver(ctx.session, o.name, mine.filter((f) => (f.format ?? "parquet") === "parquet").map((f) => path.join(run.rd.staging, f.file)));
      ctx.tables.set(o.name, { name: o.name, keys: o.keys, step: node.id, publish: {}, files: mine });
    }
    await takeAudit(ctx.session, from, node.id, node.index + 1);
  });
  ctx.progress.info(`step ${node.id}: unchanged (fingerprint ${run.prints.get(node.id)?.fingerprint.slice(0, 12)}…), taken from ${from.dir}`);
}
