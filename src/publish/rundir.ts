/**
 * Run directories that appear only when complete: work goes to a staging directory beside the
 * target and is renamed at the end; a replaced run is swapped out; staging left by a killed run
 * is cleaned up by the next one.
 */
import { existsSync, mkdirSync, readdirSync, renameSync, rmSync } from "node:fs";
import path from "node:path";

function alive(pid: number): boolean {
  try {
    process.kill(pid, 0);
    return true;
  } catch (e) {
    return (e as NodeJS.ErrnoException).code === "EPERM";
  }
}

export class RunDir {
  readonly staging: string;
  private readonly parent: string;
  private readonly base: string;

  constructor(readonly target: string) {
    this.parent = path.dirname(path.resolve(target));
    this.base = path.basename(path.resolve(target));
    this.staging = path.join(this.parent, `.${this.base}.staging-${process.pid}`);
  }

  get failed(): string {
    return path.resolve(this.target) + ".failed";
  }

  /** Removes staging left by dead runs; restores a run whose replacement was killed mid-swap. */
  cleanStale(): string[] {
    if (!existsSync(this.parent)) return [];
    const cleaned: string[] = [];
    for (const name of readdirSync(this.parent)) {
      const m = /^\.(.+)\.(staging|old)-(\d+)$/.exec(name);
      if (!m || m[1] !== this.base) continue;
      const pid = Number(m[3]);
      if (alive(pid) && pid !== process.pid) continue;
      const full = path.join(this.parent, name);
      if (m[2] === "old" && !existsSync(path.resolve(this.target))) {
        renameSync(full, path.resolve(this.target));
        cleaned.push(`restored ${this.target} from an interrupted replacement`);
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

  /** Publishes the staging directory at the target, swapping out an existing one. */
  commit(replace: boolean): void {
    const target = path.resolve(this.target);
    if (existsSync(target)) {
      if (!replace) throw new Error(`${this.target} already exists`);
      const old = path.join(this.parent, `.${this.base}.old-${process.pid}`);
      renameSync(target, old);
      renameSync(this.staging, target);
      rmSync(old, { recursive: true, force: true });
    } else {
      renameSync(this.staging, target);
    }
    rmSync(this.failed, { recursive: true, force: true });
  }

  /** Keeps the staging directory for inspection as DIR.failed. */
  fail(): string {
    rmSync(this.failed, { recursive: true, force: true });
    if (existsSync(this.staging)) renameSync(this.staging, this.failed);
    return this.failed;
  }

  discard(): void {
    rmSync(this.staging, { recursive: true, force: true });
  }
}
