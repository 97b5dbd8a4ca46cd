/**
 * `cairn merge SHARD_DIR… --out DIR`: the shards of a sharded run made into one run directory
 * (or release) equal to a run of the same pipeline on one machine.
 *
 * The shards are checked first: each is a finished shard run directory (a failed one, kept as
 * DIR.failed, stops the merge with exit 9 naming it); all come from one plan (same pipeline
 * file, options, tool version and input contents: the plan fingerprint), one shard key and one
 * count; every shard 0…N−1 is there once; their keys are the blocks of one sorted list
 * (exit 2 for a wrong set of directories). The merge is then a run in which:
 * - the steps the shard plan placed in the shards are taken over: their tables are the shards'
 *   files read as one (rows cut by the key are concatenated; shared tables, such as the lifetimes
 *   used, are the union of the shards' rows, which must agree), and published as a run of its
 *   own publishes them (sorted, so the bytes are those of a single run); their audits are
 *   merged (merge-audit.ts); sources only they read are not loaded again (their reports, audit
 *   rows and rejects come from shard 0; every shard loaded them whole);
 * - the other steps run as in any run, on those tables; a step placed in both is checked equal
 *   to the shards' rows.
 */
import { existsSync, readFileSync, statSync } from "node:fs";
import path from "node:path";
import { InputChanged, PipelineError } from "../errors.js";
import { PART_OPTIONS, partRows, partSizes } from "../ops/by-cohort-writer.js";
import { ident, idents, lit } from "../engine/sql.js";
import { loadPipeline } from "../spec/load.js";
import { buildPlan, type Plan, type StepNode } from "../plan/build.js";
import type { NodePrint } from "../plan/fingerprint.js";
import { planShards, type ShardPlan } from "../plan/shard.js";
import { sha256, type OutputFile } from "../publish/parquet.js";
import type { SourceNode } from "../plan/build.js";
import type { SourceResult } from "../sources/load.js";
import { ClusterError } from "../cluster/errors.js";
import { blockOf, type CheckMeta } from "./shard.js";
import { takeAudit, takeRejects, type PreviousRun } from "./reuse.js";
import { mergeStepAudits } from "./merge-audit.js";
import { runPipeline, type RunOptions, type RunReport, type Run } from "./runner.js";

export interface ShardManifest extends Record<string, unknown> {
  status: string;
  exit_code?: number;
  error?: string;
  started_at: string;
  finished_at: string;
  pipeline: { name: string; file: string; sha256: string; variables: Record<string, string> };
  sources: (SourceResult & { fingerprint?: string })[];
  inputs: { source: string; path: string; bytes: number; sha256: string; rows: number | null }[];
  outputs: (OutputFile & { step?: string; role?: string })[];
  shard: {
    index: number; count: number; by: string; plan_fingerprint: string; keys: string[]; all_keys: string[];
    placement: Record<string, string>; audit_checks: CheckMeta[];
  };
}

export interface ShardDir {
  index: number;
  dir: string;
  manifest: ShardManifest;
}

export interface MergeSpec {
  shards: ShardDir[];
  sp: ShardPlan;
  /** Shard files already checked against their manifests (shard dir + table → files). */
  verified: Map<string, string[]>;
  /** Throws when the plan as it is now (inputs hashed again) is not the shards' plan. */
  checkPlan(plan: Plan, prints: Map<string, NodePrint>, fingerprint: string): void;
}

const readManifest = (dir: string): ShardManifest | null => {
  const f = path.join(dir, "manifest.json");
  if (!existsSync(f)) return null;
  try {
    return JSON.parse(readFileSync(f, "utf8")) as ShardManifest;
  } catch {
    return null;
  }
};

const firstLine = (m: string | undefined) => (m ?? "").split("\n")[0]!.slice(0, 400);

/** Reads and checks the shard run directories given to a merge. */
export function readShards(dirs: string[]): ShardDir[] {
  if (!dirs.length) throw new PipelineError("cairn merge: give the shards' run directories (SHARD_DIR…)");
  const failed: string[] = [];
  const shards: ShardDir[] = [];
  for (const given of dirs) {
    const dir = path.resolve(given.replace(/\.failed\/?$/, ""));
    const m = readManifest(dir);
    const f = readManifest(dir + ".failed");
    if (!m && f) {
      failed.push(`shard ${f.shard?.index ?? "?"} (${dir}): failed with exit ${f.exit_code ?? "?"}: ${firstLine(f.error)}; see ${dir}.failed/run.log`);
      continue;
    }
    if (!m) {
      if (!existsSync(dir)) throw new PipelineError(`${given}: no such shard run directory${existsSync(path.dirname(dir)) ? "" : " (nor its folder)"}; a shard that is still running or was killed has none yet (see cairn status)`);
      throw new PipelineError(`${given}: not a run directory (no readable manifest.json)`);
    }
    if (!m.shard) throw new PipelineError(`${given}: not a shard run directory (its manifest has no shard section; shards are made by cairn run --shard K/N)`);
    if (m.status !== "ok") {
      failed.push(`shard ${m.shard.index} (${dir}): ${m.status} with exit ${m.exit_code ?? "?"}: ${firstLine(m.error)}`);
      continue;
    }
    shards.push({ index: m.shard.index, dir, manifest: m });
  }
  if (failed.length) throw new ClusterError(`cannot merge: ${failed.length} shard(s) failed:\n  ${failed.join("\n  ")}\nFix the cause and run those shards again (cairn run … --shard K/N --out <the same directory> --replace), then merge.`);
  const first = shards[0]!;
  const same = (what: string, f: (m: ShardManifest) => unknown) => {
    const groups = new Map<string, number[]>();
    for (const s of shards) {
      const k = JSON.stringify(f(s.manifest));
      groups.set(k, [...(groups.get(k) ?? []), s.index]);
    }
    if (groups.size > 1) {
      throw new PipelineError(`cannot merge: the shards differ in ${what}: ${[...groups].map(([k, ix]) => `${k.length > 80 ? k.slice(0, 77) + "...\"" : k} (shard${ix.length > 1 ? "s" : ""} ${ix.join(", ")})`).join(" vs ")}; merge only the shards of one sharded run`);
    }
  };
  same("the number of shards", (m) => m.shard.count);
  same("the shard key", (m) => m.shard.by);
  same("their pipeline file", (m) => m.pipeline.sha256);
  same("their plan fingerprint (pipeline options, tool version or input contents)", (m) => m.shard.plan_fingerprint);
  const N = first.manifest.shard.count;
  const seen = new Map<number, string>();
  for (const s of shards) {
    if (seen.has(s.index)) throw new PipelineError(`cannot merge: shard ${s.index} is given twice (${seen.get(s.index)} and ${s.dir})`);
    seen.set(s.index, s.dir);
  }
  const missing = [...Array(N).keys()].filter((k) => !seen.has(k));
  if (missing.length) {
    throw new PipelineError(`cannot merge: shard${missing.length > 1 ? "s" : ""} ${missing.join(", ")} of ${N} missing; give the run directory of every shard 0…${N - 1} (a shard that failed is kept as its directory + .failed)`);
  }
  shards.sort((a, b) => a.index - b.index);
  same("the key values they listed", (m) => m.shard.all_keys);
  const all = first.manifest.shard.all_keys;
  for (const s of shards) {
    const want = blockOf(all, s.index, N);
    if (JSON.stringify(want) !== JSON.stringify(s.manifest.shard.keys)) {
      throw new ClusterError(`cannot merge: shard ${s.index} (${s.dir}) holds the ${first.manifest.shard.by} values ${JSON.stringify(s.manifest.shard.keys.slice(0, 5))}…, not its block of the sorted list (${JSON.stringify(want.slice(0, 5))}…)`);
    }
  }
  return shards;
}

/** Merges shard run directories into one run directory (opts.out) or release (opts.release). */
export async function mergeShards(dirs: string[], opts: RunOptions = {}): Promise<RunReport> {
  const shards = readShards(dirs);
  const m0 = shards[0]!.manifest;
  const file = m0.pipeline.file;
  if (!existsSync(file)) throw new PipelineError(`cannot merge: the shards' pipeline file ${file} is not there (a merge reads it, and the sources only its steps read)`);
  const lp = loadPipeline(file, m0.pipeline.variables);
  if (lp.sha256 !== m0.pipeline.sha256) throw new InputChanged(`cannot merge: the pipeline file ${file} changed since the shards ran (SHA-256 ${lp.sha256.slice(0, 12)}…, the shards read ${m0.pipeline.sha256.slice(0, 12)}…); run the shards again`);
  const plan = await buildPlan(lp);
  const sp = await planShards(plan, m0.shard.by);
  for (const st of sp.steps) {
    if (m0.shard.placement[st.id] !== st.placement) throw new ClusterError(`cannot merge: the shards placed step ${st.id} ${m0.shard.placement[st.id] ?? "nowhere"}, this tool places it ${st.placement}`);
  }
  return runPipeline(lp, {
    ...opts,
    merge: {
      shards, sp, verified: new Map(),
      checkPlan(p, prints, fingerprint) {
        if (fingerprint === m0.shard.plan_fingerprint) return;
        const changed = p.sources.filter((s) => m0.sources.some((x) => x.name === s.name && x.fingerprint !== undefined && x.fingerprint !== prints.get(s.name)?.fingerprint)).map((s) => s.name);
        throw new InputChanged(`cannot merge: the plan changed since the shards ran (${changed.length ? `the files of source ${changed.join(", ")} changed` : "options or tool version"}); run the shards again`);
      },
    },
  });
}

/** A source only the shards' steps read: its report, audit rows and rejects from shard 0 (all shards loaded it whole and must agree). */
export async function takeSource(run: Run, node: SourceNode): Promise<void> {
  const shards = run.opts.merge!.shards;
  const reports = shards.map((sh) => sh.manifest.sources.find((x) => x.name === node.name));
  const sig = (r: SourceResult | undefined) => (r ? JSON.stringify([r.rows_read, r.rows_rejected, r.rows_filtered, r.rows_loaded, (r as { fingerprint?: string }).fingerprint]) : "none");
  const bad = reports.findIndex((r) => !r || sig(r) !== sig(reports[0]));
  if (bad >= 0) throw new ClusterError(`source ${node.name}: shard ${shards[bad]!.index} ${reports[bad] ? "read it differently from shard 0" : "did not load it"}; the shards do not come from one plan`);
  const { fingerprint: _f, method_fingerprint: _m, ...rest } = reports[0] as SourceResult & { fingerprint?: string; method_fingerprint?: string };
  run.sources.push(rest);
  const m0 = shards[0]!.manifest;
  run.inputs.push(...m0.inputs.filter((i) => i.source === node.name).map((i) => ({ source: i.source, path: i.path, bytes: i.bytes, sha256: i.sha256, rows: i.rows ?? 0 })));
  const prev: PreviousRun = { dir: shards[0]!.dir, manifest: m0 as unknown as PreviousRun["manifest"] };
  await takeAudit(run.ctx.session, prev, node.name, 0);
  await takeRejects(run.ctx.session, prev, node.name);
  run.progress.info(`source ${node.name}: read only by the shards' steps; not loaded again (report from shard 0)`);
}

/** The Parquet files of a table in every shard, checked against the shards' manifests. */
function shardFiles(run: Run, table: string): string[] {
  return withKeys(run).flatMap((sh) => filesOf(run, sh, table));
}

/** The shards that hold keys (with more shards than key values, some hold none and computed nothing). */
export function withKeys(run: Run): ShardDir[] {
  const out = run.opts.merge!.shards.filter((sh) => sh.manifest.shard.keys.length > 0);
  if (!out.length) throw new ClusterError(`no shard holds any ${run.sp!.by} value: the sources cut by ${run.sp!.by} have no rows`);
  return out;
}

/** A table of every shard as one relation, with the shard's index in `__shard`. */
function byShard(run: Run, table: string): string {
  return `(${withKeys(run).map((sh) => `SELECT ${sh.index} AS __shard, * FROM read_parquet([${filesOf(run, sh, table).map(lit).join(", ")}])`).join(" UNION ALL ")})`;
}

/** A table's files in one shard, each checked once against the SHA-256 the shard's manifest records. */
function filesOf(run: Run, sh: ShardDir, table: string): string[] {
  const key = `${sh.dir}\u0000${table}`;
  const known = run.opts.merge!.verified.get(key);
  if (known) return known;
  const out: string[] = [];
  {
    const files = sh.manifest.outputs.filter((o) => o.table === table && (o.format ?? "parquet") === "parquet");
    if (!files.length) throw new ClusterError(`shard ${sh.index} (${sh.dir}) has no file of table ${table}`);
    for (const f of files) {
      const p = path.join(sh.dir, f.file);
      if (!existsSync(p) || sha256(p) !== f.sha256) throw new ClusterError(`shard ${sh.index}: ${p} is missing or does not match the SHA-256 its manifest records; run that shard again`);
      out.push(p);
    }
  }
  run.opts.merge!.verified.set(key, out);
  return out;
}

const publishOf = (node: StepNode) => (node.step.publish === undefined || node.step.publish === true ? {} : node.step.publish === false ? false : node.step.publish);

/**
 * A streamed (cohort-resolved) table's files at the merge: the table in key order, cut into parts
 * exactly where the writer of a single run cuts it (src/ops/by-cohort-writer.ts, partSizes): the
 * writer takes the series in key order, each series' cohorts in place (before its first model
 * year) and then its model cohorts, as two additions.
 */
async function writeStreamed(run: Run, name: string, keys: string[]): Promise<OutputFile[]> {
  const s = run.ctx.session;
  const staging = run.rd.staging;
  const opts = PART_OPTIONS;
  const fileOf = async (abs: string, rows: number): Promise<OutputFile> => ({ table: name, file: path.relative(staging, abs), rows, bytes: statSync(abs).size, sha256: sha256(abs) });
  const series = keys.filter((k) => k !== "cohort" && k !== "year");
  const adds: number[] = [];
  const first = `(SELECT min(year) FROM ${ident(name)})`;
  for (const r of await s.all(`SELECT count(*) FILTER (WHERE cohort < ${first}) AS i, count(*) FILTER (WHERE cohort >= ${first}) AS m
      FROM ${ident(name)} ${series.length ? `GROUP BY ${idents(series)} ORDER BY ${idents(series)}` : ""}`)) adds.push(Number(r.i), Number(r.m));
  const parts = partSizes(adds, partRows());
  if (parts.length <= 1) {
    const f = path.join(staging, `${name}.parquet`);
    await s.run(`COPY (SELECT * FROM ${ident(name)} ORDER BY ${idents(keys)}) TO ${lit(f)} ${opts}`);
    return [await fileOf(f, parts[0] ?? 0)];
  }
  const sorted = `__cairn_sorted_${name}`;
  await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(sorted)} AS SELECT *, row_number() OVER (ORDER BY ${idents(keys)}) - 1 AS __rn FROM ${ident(name)}`);
  const { mkdirSync } = await import("node:fs");
  mkdirSync(path.join(staging, name), { recursive: true });
  const out: OutputFile[] = [];
  let from = 0;
  for (const [p, rows] of parts.entries()) {
    const f = path.join(staging, name, `part-${String(p).padStart(5, "0")}.parquet`);
    await s.run(`COPY (SELECT * EXCLUDE (__rn) FROM ${ident(sorted)} WHERE __rn >= ${from} AND __rn < ${from + rows} ORDER BY __rn) TO ${lit(f)} ${opts}`);
    out.push(await fileOf(f, rows));
    from += rows;
  }
  await s.run(`DROP TABLE ${ident(sorted)}`);
  return out;
}

/** A step the shards computed: its tables read from their files, its audits merged. */
export async function takeStep(run: Run, node: StepNode): Promise<void> {
  const { ctx } = run;
  const s = ctx.session;
  const st = run.sp!.steps.find((x) => x.id === node.id)!;
  ctx.audits.setStepIndex(node.index + 1);
  await run.time(`step:${node.id}`, async () => {
    const pub = publishOf(node);
    for (const o of node.outputs) {
      const files = shardFiles(run, o.name);
      const src = `read_parquet([${files.map(lit).join(", ")}])`;
      if (st.span && o.role === "main") await sameYears(run, node, o.name);
      if (st.shared.includes(o.name)) {
        if (o.keys.length >= 2) await sameGroups(run, node, o.name, o.keys);
        await s.run(`CREATE OR REPLACE TABLE ${ident(o.name)} AS SELECT DISTINCT * FROM ${src}`);
        const dup = await s.all(`SELECT ${o.keys.length ? idents(o.keys) : "*"}, count(*) AS n FROM ${ident(o.name)} GROUP BY ALL HAVING count(*) > 1 LIMIT 1`);
        if (dup.length) {
          throw new ClusterError(`step ${node.id}: the shards disagree on ${o.name} (${JSON.stringify(dup[0], (_k, v) => (typeof v === "bigint" ? Number(v) : v))}): this step's result depends on the series of other shards (e.g. the years or ages of its whole input), so it cannot be split by ${run.sp!.by}; run without shards`);
        }
      } else {
        await s.run(`CREATE OR REPLACE VIEW ${ident(o.name)} AS SELECT * FROM ${src}`);
      }
      const publish = pub === false ? false : o.role === "main" ? pub : {};
      const streamed = o.streamed && publish !== false ? await writeStreamed(run, o.name, o.keys) : undefined;
      ctx.tables.set(o.name, { name: o.name, keys: o.keys, step: node.id, publish, ...(streamed ? { files: streamed } : {}) });
    }
    await mergeStepAudits(run, node);
  });
  run.progress.info(`step ${node.id}: taken from ${run.opts.merge!.shards.length} shards`);
}

/** A cohort model's years come from its whole input: every shard must have the same (else its series' results differ from a single run's). */
async function sameYears(run: Run, node: StepNode, table: string): Promise<void> {
  const rows = await run.ctx.session.all(`SELECT __shard, min(year) AS y0, max(year) AS y1 FROM ${byShard(run, table)} GROUP BY ALL ORDER BY 1`);
  const spans = new Set(rows.map((r) => `${r.y0}–${r.y1}`));
  if (spans.size > 1) {
    throw new ClusterError(`step ${node.id}: the shards' models cover different years (${rows.map((r) => `shard ${r.__shard}: ${r.y0}–${r.y1}`).join(", ")}); a cohort model's years are those of its whole input, so with ${run.sp!.by} split the models differ from a single run's (their first year and stock in place move). Give every series every year in the input, or run without shards`);
  }
}

/** A shared table (e.g. the lifetimes used, by row and age): each group of rows is the same in every shard that has it. */
async function sameGroups(run: Run, node: StepNode, table: string, keys: string[]): Promise<void> {
  const g = keys.slice(0, -1);
  const bad = await run.ctx.session.all(`SELECT ${idents(g)}, min(n) AS lo, max(n) AS hi FROM (SELECT __shard, ${idents(g)}, count(*) AS n FROM ${byShard(run, table)} GROUP BY ALL)
    GROUP BY ALL HAVING min(n) <> max(n) LIMIT 1`);
  if (bad.length) {
    const { lo, hi, ...k } = bad[0]!;
    throw new ClusterError(`step ${node.id}: the shards list ${table} for ${JSON.stringify(k, (_k, v) => (typeof v === "bigint" ? Number(v) : v))} over ${lo} to ${hi} ${keys.at(-1)} values: this step's tables depend on the series of other shards, so it cannot be split by ${run.sp!.by}; run without shards`);
  }
}

/** A step computed in the shards and again at the merge: the shards' rows must be the merge's. */
export async function checkBoth(run: Run, node: StepNode): Promise<void> {
  const s = run.ctx.session;
  const st = run.sp!.steps.find((x) => x.id === node.id)!;
  for (const t of st.partitioned) {
    const src = `read_parquet([${shardFiles(run, t).map(lit).join(", ")}])`;
    const r = await s.one(`SELECT (SELECT count(*) FROM (SELECT * FROM ${ident(t)} EXCEPT ALL SELECT * FROM ${src})) AS here,
      (SELECT count(*) FROM (SELECT * FROM ${src} EXCEPT ALL SELECT * FROM ${ident(t)})) AS there`);
    if (Number(r.here) || Number(r.there)) {
      throw new ClusterError(`step ${node.id}: the shards' rows of ${t} differ from the merge's (${Number(r.here)} rows only at the merge, ${Number(r.there)} only in the shards): the step is not per ${run.sp!.by} on this data, and the shards' later steps used those rows (report this; run without shards meanwhile)`);
    }
  }
}

/** The shards, for the merged run's manifest. */
export function mergeManifest(run: Run): { index: number; dir: string; keys: number; started_at: string; finished_at: string }[] {
  return run.opts.merge!.shards.map((sh) => ({ index: sh.index, dir: sh.dir, keys: sh.manifest.shard.keys.length, started_at: sh.manifest.started_at, finished_at: sh.manifest.finished_at }));
}
