/** Revisions of a run against the previous release: input changes per source, revisions per published table, and their audit. */
import path from "node:path";
import { ident } from "../engine/sql.js";
import { writeParquet } from "../publish/parquet.js";
import { changesTable, inputChanges, revisionAudit, revisions, revisionsTable } from "../publish/revisions.js";
import type { Run } from "./runner.js";

/** Sources a step depends on (data sources, or with `config` the small configuring tables), through the steps before it. */
function upstreamSources(run: Run, step: string, config = false, seen = new Set<string>()): Set<string> {
  const out = new Set<string>();
  const node = run.plan.steps.find((n) => n.id === step);
  if (!node || seen.has(step)) return out;
  seen.add(step);
  for (const r of node.reads) {
    const producer = run.plan.producer.get(r.table);
    if (producer) for (const x of upstreamSources(run, producer, config, seen)) out.add(x);
    else if (run.plan.sources.some((src) => src.name === r.table && src.config === config)) out.add(r.table);
  }
  return out;
}

export async function publishRevisions(run: Run): Promise<void> {
  const prev = run.previous!;
  const s = run.ctx.session;
  const prevSource = new Map((prev.manifest.sources ?? []).map((x) => [x.name, x]));
  const prevStep = new Map((prev.manifest.steps ?? []).map((x) => [x.id, x]));
  // Input changes of every data source whose files changed.
  const changed = new Map<string, boolean>();
  for (const src of run.plan.sources) {
    if (prevSource.get(src.name)?.fingerprint === run.prints.get(src.name)?.fingerprint) continue;
    if (!run.ctx.tables.has(src.name)) continue;
    const n = await inputChanges(s, src.name, src.schema, prev);
    changed.set(src.name, (n ?? 1) > 0);
    if (n === null) continue;
    const written = await writeParquet(s, { table: changesTable(src.name), sql: `SELECT * FROM ${ident(changesTable(src.name))}`, dir: run.rd.staging, name: `changes/${src.name}` });
    run.outputs.push(...written.map((f) => ({ ...f, table: `changes:${src.name}`, role: "changes" })));
  }
  const newest = await newestDataYear(run);
  const a = run.lp.pipeline.audit;
  for (const node of run.plan.steps) {
    run.audits.setStepIndex(node.index + 1);
    const optionsChanged = prevStep.get(node.id)?.options_fingerprint !== run.prints.get(node.id)?.options;
    const ups = [...upstreamSources(run, node.id)];
    const configs = [...upstreamSources(run, node.id, true)].filter((c) => run.outputs.some((f) => f.table === `changes:${c}`));
    for (const o of node.outputs) {
      const info = run.ctx.tables.get(o.name);
      if (!info || info.publish === false || o.streamed) continue;
      const previousFiles = prev.manifest.outputs.filter((f) => f.table === o.name && (f.format ?? "parquet") === "parquet").map((f) => path.join(prev.dir, f.file));
      if (!previousFiles.length) continue; // a table the previous release did not publish
      const rows = await revisions(s, {
        table: o.name, step: node.id, schema: o, previousFiles, methodChanged: optionsChanged,
        changedConfig: configs.map((c) => ({ name: c, schema: run.plan.schemas.get(c)! })),
        changedSources: ups.filter((u) => changed.has(u)).map((u) => ({ name: u, schema: run.plan.schemas.get(u)!, hasChanges: changed.get(u)! && run.outputs.some((f) => f.table === `changes:${u}`) })),
        tables: new Set(run.ctx.tables.keys()),
      });
      const written = await writeParquet(s, { table: revisionsTable(o.name), sql: `SELECT * FROM ${ident(revisionsTable(o.name))}`, dir: run.rd.staging, name: `revisions/${o.name}` });
      run.outputs.push(...written.map((f) => ({ ...f, table: `revisions:${o.name}`, step: node.id, role: "revisions" })));
      run.revisionCounts.push({ table: o.name, rows });
      if (o.role === "main") await revisionAudit(run.audits, o.name, node.id, o, newest, a.revision_threshold, a.revision_severity);
    }
  }
}

/**
 * The newest year of observed data: the newest year of the data sources (not the small
 * configuring tables) behind the history, that is, behind the models that a scenario continues
 * when there are any (a population path to 2050 is a scenario driver, not data), else behind
 * every step. Revisions before it must be explained; exported years after it are forecasts.
 */
export async function newestDataYear(run: Run): Promise<number | null> {
  const continued = run.plan.steps.map((n) => (n.step as { continues?: { step: string } }).continues?.step).filter((x): x is string => Boolean(x));
  const history = continued.length ? new Set(continued.flatMap((id) => [...upstreamSources(run, id)])) : null;
  let newest: number | null = null;
  for (const src of run.plan.sources) {
    if (src.config || (history && !history.has(src.name))) continue;
    // Loaded or taken over, every source report carries its newest year.
    const y = run.sources.find((r) => r.name === src.name)?.year_max;
    if (y !== null && y !== undefined) newest = Math.max(newest ?? -Infinity, Number(y));
  }
  return newest;
}
