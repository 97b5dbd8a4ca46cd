/**
 * A sharded run on a Slurm cluster (`cairn submit FILE --slurm --shards N --out DIR`): two batch
 * scripts in the work folder beside DIR (`DIR.shards/`), a job array of the shards and a merge
 * job that runs only when every shard succeeded (`--dependency=afterok:<array>` with
 * `--kill-on-invalid-dep=yes`: a failed shard cancels the merge instead of leaving it pending).
 *
 *   DIR.shards/
 *     submit.json        what was submitted: command, shards, job ids, times
 *     shards.sbatch      the job array: task K runs `cairn run FILE --shard K/N … --out shard-K`
 *     merge.sbatch       `cairn merge shard-0 … shard-(N−1) --out DIR`
 *     shard-K/           each shard's run directory (shard-K.failed when it failed)
 *     logs/              shard-K.log, merge.log (the jobs' stdout and stderr)
 *
 * The scripts call the node and cairn that wrote them, by absolute path, from the folder the
 * command ran in: on a real cluster those paths (and the pipeline and its data) must be on a
 * file system the compute nodes share; `--setup` adds lines (e.g. `module load nodejs/20`).
 */
import { spawnSync } from "node:child_process";
import { existsSync, mkdirSync, readFileSync, writeFileSync } from "node:fs";
import path from "node:path";
import { fileURLToPath } from "node:url";
import { PipelineError } from "../errors.js";
import { ClusterError } from "./errors.js";

export interface SubmitOptions {
  /** The pipeline file (absolute). */
  file: string;
  /** The merged run directory (absolute); for a release, <catalog>/<id>. */
  out: string;
  shards: number;
  by: string;
  set: string[];
  partition?: string;
  time?: string;
  mem?: string;
  cpus: number;
  /** CPUs of the merge job (default: cpus). */
  mergeCpus?: number;
  account?: string;
  setup: string[];
  /** DuckDB's memory limit in each job (spills beyond it). */
  memoryLimit?: string;
  replace: boolean;
  release?: string;
  catalog?: string;
  /** The folder the scripts run in (default: the current one). */
  cwd: string;
  /** Pipeline name, for job names. */
  name: string;
}

export interface Submitted {
  work: string;
  array_job: string;
  merge_job: string;
  shards: number;
  out: string;
}

export const workDir = (out: string) => path.resolve(out) + ".shards";
export const shardDir = (work: string, k: number) => path.join(work, `shard-${k}`);
export const SUBMIT_FILE = "submit.json";

/** One shell word, quoted. */
export function sh(s: string): string {
  return /^[A-Za-z0-9_@%+=:,./-]+$/.test(s) ? s : `'${s.replace(/'/g, `'\\''`)}'`;
}

const cli = () => fileURLToPath(new URL("../cli/main.js", import.meta.url));

/** --time as Slurm takes it: minutes, MM:SS, HH:MM:SS, D-HH, D-HH:MM or D-HH:MM:SS. */
export function checkTime(v: string): string {
  if (!/^(\d+|\d+:\d{2}|\d+:\d{2}:\d{2}|\d+-\d+|\d+-\d+:\d{2}|\d+-\d+:\d{2}:\d{2})$/.test(v.trim())) {
    throw new PipelineError(`--time ${JSON.stringify(v)}: expected a Slurm time limit: minutes, MM:SS, HH:MM:SS or D-HH:MM:SS (e.g. 2:00:00)`);
  }
  return v.trim();
}

/** --mem as Slurm takes it: a whole number with an optional unit K, M, G or T (e.g. 8G). */
export function checkMem(v: string): string {
  if (!/^\d+[KMGT]?$/i.test(v.trim())) throw new PipelineError(`--mem ${JSON.stringify(v)}: expected a whole number with an optional unit K, M, G or T, e.g. 8G`);
  return v.trim().toUpperCase();
}

/** A partition or account name. */
export function checkName(opt: string, v: string): string {
  if (!/^[A-Za-z0-9_.,-]+$/.test(v)) throw new PipelineError(`${opt} ${JSON.stringify(v)}: expected a Slurm name (letters, digits, _ . , -)`);
  return v;
}

function header(o: SubmitOptions, job: string, log: string, extra: string[], cpus = o.cpus): string[] {
  return [
    "#!/bin/bash",
    `#SBATCH --job-name=${sh(`cairn-${o.name}-${job}`)}`,
    ...extra,
    `#SBATCH --output=${sh(log)}`,
    `#SBATCH --cpus-per-task=${cpus}`,
    ...(o.partition ? [`#SBATCH --partition=${o.partition}`] : []),
    ...(o.account ? [`#SBATCH --account=${o.account}`] : []),
    ...(o.time ? [`#SBATCH --time=${o.time}`] : []),
    ...(o.mem ? [`#SBATCH --mem=${o.mem}`] : []),
    `# written by cairn submit for ${o.file}`,
    "set -euo pipefail",
    ...o.setup,
    `cd ${sh(o.cwd)}`,
    // DuckDB threads and cohort worker threads: the task's CPUs, not the node's.
    'export CAIRN_WORKERS="${SLURM_CPUS_PER_TASK:-1}"',
  ];
}

/** The job array's script: task K is shard K. */
export function shardScript(o: SubmitOptions, work: string): string {
  const sets = [...o.set.flatMap((v) => ["--set", sh(v)]), ...(o.memoryLimit ? ["--memory-limit", sh(o.memoryLimit)] : [])].join(" ");
  return [
    ...header(o, "shards", path.join(work, "logs", "shard-%a.log"), [`#SBATCH --array=0-${o.shards - 1}`]),
    `exec ${sh(process.execPath)} ${sh(cli())} run ${sh(o.file)} --shard "\${SLURM_ARRAY_TASK_ID}/${o.shards}" --shard-by ${sh(o.by)} \\`,
    `  --out ${sh(work)}/shard-"\${SLURM_ARRAY_TASK_ID}" --replace --quiet --threads "\${SLURM_CPUS_PER_TASK:-1}"${sets ? ` ${sets}` : ""}`,
    "",
  ].join("\n");
}

/** The merge job's script. */
export function mergeScript(o: SubmitOptions, work: string): string {
  const dirs = [...Array(o.shards).keys()].map((k) => sh(shardDir(work, k))).join(" ");
  const target = o.release ? `--release ${sh(o.release)}${o.catalog ? ` --catalog ${sh(o.catalog)}` : ""}` : `--out ${sh(o.out)}`;
  return [
    ...header(o, "merge", path.join(work, "logs", "merge.log"), [], o.mergeCpus ?? o.cpus),
    `exec ${sh(process.execPath)} ${sh(cli())} merge ${dirs} \\`,
    `  ${target}${o.replace ? " --replace" : ""}${o.memoryLimit ? ` --memory-limit ${sh(o.memoryLimit)}` : ""} --quiet --threads "\${SLURM_CPUS_PER_TASK:-1}"`,
    "",
  ].join("\n");
}

function sbatch(args: string[], cwd: string): string {
  const r = spawnSync("sbatch", ["--parsable", ...args], { cwd, encoding: "utf8" });
  if (r.error) {
    throw new ClusterError(`sbatch could not be run (${(r.error as NodeJS.ErrnoException).code === "ENOENT" ? "not found on the PATH: is this a Slurm login node?" : r.error.message})`);
  }
  if (r.status !== 0) throw new ClusterError(`sbatch ${args.join(" ")} failed (exit ${r.status}): ${(r.stderr || r.stdout).trim()}`);
  const id = r.stdout.trim().split(";")[0]!;
  if (!/^\d+$/.test(id)) throw new ClusterError(`sbatch answered ${JSON.stringify(r.stdout.trim())}, not a job id`);
  return id;
}

/** Writes the scripts and submits them (or, with dryRun, only returns them). */
export function submit(o: SubmitOptions, dryRun: boolean): { scripts: { shards: string; merge: string }; submitted: Submitted | null } {
  const work = workDir(o.out);
  const scripts = { shards: shardScript(o, work), merge: mergeScript(o, work) };
  if (dryRun) return { scripts, submitted: null };
  mkdirSync(path.join(work, "logs"), { recursive: true });
  writeFileSync(path.join(work, "shards.sbatch"), scripts.shards, { mode: 0o755 });
  writeFileSync(path.join(work, "merge.sbatch"), scripts.merge, { mode: 0o755 });
  const submittedAt = new Date().toISOString();
  const array = sbatch([path.join(work, "shards.sbatch")], o.cwd);
  let merge: string;
  try {
    merge = sbatch([`--dependency=afterok:${array}`, "--kill-on-invalid-dep=yes", path.join(work, "merge.sbatch")], o.cwd);
  } catch (e) {
    spawnSync("scancel", [array]);
    throw new ClusterError(`${(e as Error).message}; the shards' job array ${array} was cancelled`);
  }
  const record = {
    pipeline: o.file, out: o.out, shards: o.shards, by: o.by, set: o.set, release: o.release ?? null, catalog: o.catalog ?? null,
    submitted_at: submittedAt, array_job: array, merge_job: merge,
    shard_dirs: [...Array(o.shards).keys()].map((k) => shardDir(work, k)),
  };
  writeFileSync(path.join(work, SUBMIT_FILE), JSON.stringify(record, null, 2) + "\n");
  return { scripts, submitted: { work, array_job: array, merge_job: merge, shards: o.shards, out: o.out } };
}

export interface SubmitRecord {
  pipeline: string;
  out: string;
  shards: number;
  by: string;
  submitted_at: string;
  array_job: string;
  merge_job: string;
  shard_dirs: string[];
}

/** The work folder's record, from DIR (the merged run's directory) or the work folder itself. */
export function readSubmit(dir: string): { work: string; record: SubmitRecord } {
  const abs = path.resolve(dir);
  for (const work of [abs, workDir(abs)]) {
    const f = path.join(work, SUBMIT_FILE);
    if (existsSync(f)) return { work, record: JSON.parse(readFileSync(f, "utf8")) as SubmitRecord };
  }
  throw new PipelineError(`${dir}: no sharded run submitted there (neither ${path.join(abs, SUBMIT_FILE)} nor ${path.join(workDir(abs), SUBMIT_FILE)}); give the --out of cairn submit`);
}

export interface JobState {
  id: string;
  state: string;
  reason: string;
}

/** Jobs' states from squeue (pending, running and, within MinJobAge, finished ones); null when squeue is not there or does not answer. */
export function squeueStates(ids: string[]): Map<string, JobState> | null {
  const r = spawnSync("squeue", ["-h", "-t", "all", "-j", ids.join(","), "-o", "%i|%T|%r"], { encoding: "utf8", timeout: 15_000 });
  if (r.error || r.status !== 0) return null;
  const out = new Map<string, JobState>();
  for (const line of r.stdout.split("\n")) {
    const [id, state, reason] = line.trim().split("|");
    if (id && state) out.set(id, { id, state, reason: reason ?? "" });
  }
  return out;
}
