/**
 * `cairn status DIR`: where a submitted sharded run stands, read from the shards' run
 * directories (done: a manifest; failed: DIR.failed with its error; running: a staging
 * directory; else pending) and, where squeue answers, from Slurm's job states (a merge job
 * cancelled with DependencyNeverSatisfied: a shard failed).
 */
import { existsSync, readdirSync, readFileSync } from "node:fs";
import path from "node:path";
import { readSubmit, squeueStates, type JobState, type SubmitRecord } from "./slurm.js";

export type State = "pending" | "running" | "done" | "failed" | "cancelled";

export interface PartStatus {
  name: string;
  dir: string;
  state: State;
  /** What the run directory or the job says (an error's first line, the job's state and reason). */
  detail: string;
  job?: string;
}

export interface RunStatus {
  work: string;
  out: string;
  state: State;
  shards: PartStatus[];
  merge: PartStatus;
  submitted_at: string;
  squeue: boolean;
}

function manifestOf(dir: string): Record<string, unknown> | null {
  try {
    return JSON.parse(readFileSync(path.join(dir, "manifest.json"), "utf8")) as Record<string, unknown>;
  } catch {
    return null;
  }
}

/** A run directory's state; runs that started before the submission (an earlier attempt) do not count. */
function dirState(dir: string, since: string): { state: State; detail: string } {
  const fresh = (m: Record<string, unknown> | null) => m !== null && String(m.started_at ?? "") >= since;
  const ok = manifestOf(dir);
  if (fresh(ok) && ok!.status === "ok") return { state: "done", detail: `finished ${ok!.finished_at}` };
  const failed = manifestOf(dir + ".failed");
  if (fresh(failed)) return { state: "failed", detail: `exit ${failed!.exit_code}: ${String(failed!.error ?? "").split("\n")[0]!.slice(0, 300)} (see ${dir}.failed/run.log)` };
  const parent = path.dirname(dir);
  const staging = existsSync(parent) ? readdirSync(parent).find((f) => f.startsWith(`.${path.basename(dir)}.staging-`)) : undefined;
  if (staging) return { state: "running", detail: `writing ${path.join(parent, staging)}` };
  return { state: "pending", detail: "no run directory yet" };
}

/** Combines what the directory and the job say. */
function withJob(p: PartStatus, job: JobState | undefined): PartStatus {
  if (!job) return p;
  const said = `job ${job.id} ${job.state}${job.reason && job.reason !== "None" ? ` (${job.reason})` : ""}`;
  if (p.state === "done" || p.state === "failed") return { ...p, job: job.id, detail: `${p.detail}; ${said}` };
  if (job.state === "CANCELLED") return { ...p, job: job.id, state: "cancelled", detail: said };
  if (["FAILED", "TIMEOUT", "OUT_OF_MEMORY", "NODE_FAIL", "BOOT_FAIL", "DEADLINE", "PREEMPTED"].includes(job.state)) {
    return { ...p, job: job.id, state: "failed", detail: `${said}: the job ended without a run directory (killed? see the job's log)` };
  }
  if (job.state === "RUNNING" || job.state === "COMPLETING" || job.state === "CONFIGURING") return { ...p, job: job.id, state: "running", detail: said };
  if (job.state === "COMPLETED") return { ...p, job: job.id, detail: `${said}, but ${p.detail}` };
  return { ...p, job: job.id, detail: said };
}

export function runStatus(dir: string): RunStatus {
  const { work, record } = readSubmit(dir);
  return statusOf(work, record);
}

export function statusOf(work: string, r: SubmitRecord): RunStatus {
  const jobs = squeueStates([r.array_job, r.merge_job]);
  const arrayJob = (k: number) => jobs?.get(`${r.array_job}_${k}`) ?? (jobs ? [...jobs.values()].find((j) => rangeHas(j.id, r.array_job, k)) : undefined);
  const shards = r.shard_dirs.map((d, k) => withJob({ name: `shard ${k}`, dir: d, ...dirState(d, r.submitted_at) }, arrayJob(k)));
  const merge = withJob({ name: "merge", dir: r.out, ...dirState(r.out, r.submitted_at) }, jobs?.get(r.merge_job));
  const states = [...shards.map((s) => s.state), merge.state];
  const state: State = merge.state === "done" ? "done"
    : states.includes("failed") ? "failed"
      : states.includes("cancelled") ? "cancelled"
        : states.includes("running") ? "running" : "pending";
  return { work, out: r.out, state, shards, merge, submitted_at: r.submitted_at, squeue: jobs !== null };
}

/** squeue lists a pending array as 12_[0-3] or 12_[1,3-5]: is task k in it? */
function rangeHas(id: string, array: string, k: number): boolean {
  const m = new RegExp(`^${array}_\\[(.*)\\]$`).exec(id);
  if (!m) return false;
  return m[1]!.split(",").some((part) => {
    const [a, b] = part.split("-").map((x) => Number(x.replace(/%.*$/, "")));
    return b === undefined ? a === k : k >= a! && k <= b;
  });
}

export function statusText(s: RunStatus): string {
  const lines = [`sharded run into ${s.out}: ${s.state.toUpperCase()} (submitted ${s.submitted_at}; work folder ${s.work}${s.squeue ? "" : "; squeue did not answer, states from the run directories only"})`];
  for (const p of [...s.shards, s.merge]) lines.push(`  ${p.name.padEnd(9)} ${p.state.padEnd(9)} ${p.detail}`);
  if (s.state === "cancelled" || (s.state === "failed" && s.merge.state !== "failed")) {
    const bad = s.shards.filter((p) => p.state === "failed" || p.state === "cancelled").map((p) => p.name);
    lines.push(`${bad.length ? `${bad.join(", ")} failed` : "a job was cancelled"}; the merge does not run (--kill-on-invalid-dep). Fix the cause, then run the failed shards again and merge: see ${path.join(s.work, "shards.sbatch")} and ${path.join(s.work, "merge.sbatch")}`);
  }
  return lines.join("\n") + "\n";
}
