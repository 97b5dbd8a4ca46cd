/**
 * Locks on run targets and catalogs: a lock file created exclusively (O_EXCL) beside the
 * target, holding who took it. A second run to the same target fails at once (exit 5) naming
 * the holder. A lock whose holder is a dead process on this host is stale and taken over; one
 * held from another host is never broken automatically (the message says how to remove it).
 */
import { closeSync, openSync, readFileSync, rmSync, writeSync } from "node:fs";
import { hostname } from "node:os";
import { TargetBusy } from "../errors.js";

export interface LockHolder {
  pid: number;
  host: string;
  started_at: string;
  command: string;
  target: string;
}

export function alive(pid: number): boolean {
  try {
    process.kill(pid, 0);
    return true;
  } catch (e) {
    return (e as NodeJS.ErrnoException).code === "EPERM";
  }
}

export function readHolder(file: string): LockHolder | null {
  try {
    return JSON.parse(readFileSync(file, "utf8")) as LockHolder;
  } catch {
    return null;
  }
}

/** True when the lock file is held by a live process (or by another host). */
export function isHeld(file: string): boolean {
  const h = readHolder(file);
  if (!h) return false;
  return h.host !== hostname() || alive(h.pid);
}

export class Lock {
  private released = false;
  private constructor(readonly file: string) {}

  /** Takes the lock or throws TargetBusy naming the holder. `what` names the target in messages. */
  static acquire(file: string, target: string, what = "target"): Lock {
    const me: LockHolder = { pid: process.pid, host: hostname(), started_at: new Date().toISOString(), command: process.argv.slice(1).join(" "), target };
    for (let attempt = 0; attempt < 3; attempt++) {
      try {
        const fd = openSync(file, "wx");
        try {
          writeSync(fd, JSON.stringify(me) + "\n");
        } finally {
          closeSync(fd);
        }
        return new Lock(file);
      } catch (e) {
        if ((e as NodeJS.ErrnoException).code !== "EEXIST") throw e;
        const h = readHolder(file);
        if (h && h.host === hostname() && !alive(h.pid)) {
          rmSync(file, { force: true }); // stale: its holder died
          continue;
        }
        if (!h) {
          // Being written this instant, or left empty by a crash: wait briefly, then treat as stale.
          if (attempt < 2) {
            Atomics.wait(new Int32Array(new SharedArrayBuffer(4)), 0, 0, 50);
            continue;
          }
          rmSync(file, { force: true });
          continue;
        }
        throw new TargetBusy(`${what} ${target} is in use by another run: pid ${h.pid} on ${h.host}, since ${h.started_at} (${h.command}). ` +
          `Wait for it to finish${h.host !== hostname() ? `, or, if that run is gone, remove ${file}` : ""}.`);
      }
    }
    throw new TargetBusy(`${what} ${target}: could not take the lock ${file}`);
  }

  release(): void {
    if (this.released) return;
    this.released = true;
    const h = readHolder(this.file);
    if (h && h.pid === process.pid && h.host === hostname()) rmSync(this.file, { force: true });
  }
}
