/**
 * Run directories that appear only when complete, and never at the wrong place.
 *
 * - A lock (`.DIR.lock` beside the target, publish/lock.ts) is taken before anything is
 *   touched: a second run to the same target fails at once with exit 5, naming the holder.
 * - `--replace` replaces only a cairn run directory (a manifest.json written by cairn), never
 *   the current directory or one of its ancestors, nor a folder holding the pipeline file or an
 *   input; a regular file at the target is refused.
 * - The run is written to a staging directory beside the target (`.DIR.staging-<pid>`) and
 *   published in one step: renamed into place, or, replacing, exchanged with the old run by
 *   renameat2(RENAME_EXCHANGE) (native/fsx.c), so the target is never absent; without that
 *   call, two renames, and an interrupted swap is repaired by the next run.
 * - Staging left by killed runs is removed by the next run in the same folder whose lock is not
 *   held, whatever the pid (pids are reused).
 */
import { existsSync, lstatSync, mkdirSync, readdirSync, readFileSync, realpathSync, renameSync, rmSync } from "node:fs";
import { createRequire } from "node:module";
import path from "node:path";
import { PipelineError } from "../errors.js";
import { isHeld, Lock } from "./lock.js";

const require = createRequire(import.meta.url);
let fsx: { exchange(a: string, b: string): number } | null | undefined;
function nativeExchange(): { exchange(a: string, b: string): number } | null {
  if (fsx === undefined) {
    try {
      fsx = process.env.CAIRN_NATIVE === "0" ? null : (require("../../build/cairn_fsx.node") as { exchange(a: string, b: string): number });
    } catch {
      fsx = null;
    }
  }
  return fsx;
}

/** Swaps two existing paths atomically; false where the system cannot (then the caller falls back). */
export function exchangePaths(a: string, b: string): boolean {
  const x = nativeExchange();
  return x !== null && x.exchange(a, b) === 0;
}

/** The real path of the longest existing prefix of `p`, with the rest appended (symlinks resolved). */
export function realish(p: string): string {
  const abs = path.resolve(p);
  let head = abs;
  const tail: string[] = [];
  while (!existsSync(head)) {
    tail.unshift(path.basename(head));
    const up = path.dirname(head);
    if (up === head) break;
    head = up;
  }
  try {
    return path.join(realpathSync(head), ...tail);
  } catch {
    return abs;
  }
}

const within = (inner: string, outer: string) => inner === outer || inner.startsWith(outer.endsWith(path.sep) ? outer : outer + path.sep);

/** A cairn run directory: a folder with a manifest.json that cairn wrote. */
export function isRunDirectory(dir: string): boolean {
  try {
    const m = JSON.parse(readFileSync(path.join(dir, "manifest.json"), "utf8")) as { tool?: { name?: string } };
    return m?.tool?.name === "cairn";
  } catch {
    return false;
  }
}

export interface TargetRules {
  replace: boolean;
  /** Folders and files that must survive the run (the pipeline file's folder, the inputs). */
  protect: string[];
  cwd?: string;
}

/** Refuses targets that would lose data; exit 2 with what to do instead. */
export function checkTarget(target: string, rules: TargetRules): void {
  const t = realish(target);
  const cwd = realish(rules.cwd ?? process.cwd());
  if (within(cwd, t)) {
    throw new PipelineError(`--out ${target}: refused: it is the current directory or one of its parents; a run directory must be a folder of its own (e.g. runs/<name>)`);
  }
  for (const p of rules.protect) {
    const rp = realish(p);
    if (within(rp, t)) {
      throw new PipelineError(`--out ${target}: refused: it holds ${p}, which this run reads (the pipeline file or an input); choose a folder of its own for the run`);
    }
  }
  if (!existsSync(t)) return;
  const st = lstatSync(t);
  if (!st.isDirectory()) {
    throw new PipelineError(`--out ${target}: refused: a ${st.isSymbolicLink() ? "symbolic link" : "file"} is there; a run directory is a folder`);
  }
  if (!rules.replace) {
    throw new PipelineError(`${target} already exists; pass --replace to swap it for the new run, or choose another --out`);
  }
  if (!isRunDirectory(t)) {
    throw new PipelineError(`--out ${target} --replace: refused: ${target} is not a cairn run directory (it has no manifest.json written by cairn); --replace only replaces an earlier run`);
  }
}

export class RunDir {
  readonly staging: string;
  readonly parent: string;
  readonly base: string;
  private lock: Lock | null = null;

  constructor(readonly target: string) {
    this.parent = path.dirname(path.resolve(target));
    this.base = path.basename(path.resolve(target));
    this.staging = path.join(this.parent, `.${this.base}.staging-${process.pid}`);
  }

  get lockFile(): string {
    return path.join(this.parent, `.${this.base}.lock`);
  }

  get failed(): string {
    return path.resolve(this.target) + ".failed";
  }

  /** Takes the target's lock (exit 5 when another run holds it). */
  acquire(): void {
    mkdirSync(this.parent, { recursive: true });
    this.lock = Lock.acquire(this.lockFile, path.resolve(this.target), "run target");
  }

  release(): void {
    this.lock?.release();
    this.lock = null;
  }

  /** With the lock held: removes staging left by dead runs; restores a run whose replacement was cut mid-swap. */
  cleanStale(): string[] {
    if (!existsSync(this.parent)) return [];
    const cleaned: string[] = [];
    for (const name of readdirSync(this.parent)) {
      // Another target's lock whose holder died (a crashed run): removed.
      const l = /^\.(.+)\.lock$/.exec(name);
      if (l && l[1] !== this.base && !isHeld(path.join(this.parent, name))) {
        rmSync(path.join(this.parent, name), { force: true });
        continue;
      }
      const m = /^\.(.+)\.(staging|old)-(\d+)$/.exec(name);
      if (!m) continue;
      const full = path.join(this.parent, name);
      const mine = m[1] === this.base;
      // Another target's leftovers are stale when nobody holds that target's lock.
      if (!mine && isHeld(path.join(this.parent, `.${m[1]}.lock`))) continue;
      if (mine && Number(m[3]) === process.pid) continue;
      const target = path.join(this.parent, m[1]!);
      if (m[2] === "old" && !existsSync(target)) {
        renameSync(full, target);
        cleaned.push(`restored ${target} from an interrupted replacement`);
      } else {
        rmSync(full, { recursive: true, force: true });
        cleaned.push(`removed ${full} left by an interrupted run`);
      }
    }
    return cleaned;
  }

  exists(): boolean {
    return existsSync(path.resolve(this.target));
  }

  create(): void {
    mkdirSync(this.parent, { recursive: true });
    rmSync(this.staging, { recursive: true, force: true });
    mkdirSync(this.staging, { recursive: true });
  }

  /** Publishes the staging directory at the target: renamed, or exchanged with the old run (never absent). */
  commit(replace: boolean): void {
    const target = path.resolve(this.target);
    if (existsSync(target)) {
      if (!replace) throw new PipelineError(`${this.target} already exists`);
      if (!isRunDirectory(target)) throw new PipelineError(`--out ${this.target} --replace: refused: not a cairn run directory`);
      if (exchangePaths(this.staging, target)) {
        rmSync(this.staging, { recursive: true, force: true }); // now the old run
      } else {
        const old = path.join(this.parent, `.${this.base}.old-${process.pid}`);
        renameSync(target, old);
        renameSync(this.staging, target);
        rmSync(old, { recursive: true, force: true });
      }
    } else {
      renameSync(this.staging, target);
    }
    if (isRunDirectory(this.failed)) rmSync(this.failed, { recursive: true, force: true });
    this.release();
  }

  /** Keeps the staging directory for inspection as DIR.failed (never over something that is not an earlier failed run). */
  fail(): string {
    let dest = this.failed;
    if (existsSync(dest)) {
      if (isRunDirectory(dest)) rmSync(dest, { recursive: true, force: true });
      else dest = `${this.failed}-${process.pid}`;
    }
    if (existsSync(this.staging)) renameSync(this.staging, dest);
    this.release();
    return dest;
  }

  discard(): void {
    rmSync(this.staging, { recursive: true, force: true });
    this.release();
  }
}
