/**
 * Inputs as read: what the outputs come from is exactly what the manifest records. Each input
 * file is hashed (SHA-256) and stat'ed before DuckDB reads it; its size, modification time and
 * inode are compared after every step, and at the end, before anything is published, every file
 * is hashed again. A file changed, replaced, appended to or removed during the run stops it
 * (exit 8) naming the file and what changed; nothing is published.
 */
import { createHash } from "node:crypto";
import { createReadStream, statSync } from "node:fs";
import { InputChanged } from "../errors.js";

interface Seen {
  source: string;
  path: string;
  bytes: number;
  mtimeMs: number;
  ino: number;
  sha256: string;
}

export async function sha256File(file: string): Promise<string> {
  const h = createHash("sha256");
  await new Promise<void>((resolve, reject) => {
    createReadStream(file, { highWaterMark: 1 << 20 })
      .on("data", (d) => h.update(d))
      .on("end", () => resolve())
      .on("error", reject);
  });
  return h.digest("hex");
}

export class InputWatch {
  private readonly seen = new Map<string, Seen>();

  /** Hashes and stats the files before they are read; returns bytes and hash per file. */
  async record(source: string, files: string[]): Promise<Map<string, { bytes: number; sha256: string }>> {
    const out = new Map<string, { bytes: number; sha256: string }>();
    await Promise.all(files.map(async (f) => {
      const known = this.seen.get(f);
      if (known) {
        // Hashed before (for the fingerprints): checked unchanged since, not read again.
        this.checkStat(`when source ${source} was loaded`);
        out.set(f, { bytes: known.bytes, sha256: known.sha256 });
        return;
      }
      const before = statSync(f);
      const sha256 = await sha256File(f);
      const after = statSync(f);
      if (before.size !== after.size || before.mtimeMs !== after.mtimeMs) {
        throw new InputChanged(`source ${source}: ${f} changed while it was being read (${describe(before, after)}); nothing was published. Run again once the file is complete.`);
      }
      this.seen.set(f, { source, path: f, bytes: after.size, mtimeMs: after.mtimeMs, ino: after.ino, sha256 });
      out.set(f, { bytes: after.size, sha256 });
    }));
    return out;
  }

  /** The recorded files (path, bytes, SHA-256), for the manifest. */
  files(): { source: string; path: string; bytes: number; sha256: string }[] {
    return [...this.seen.values()].map(({ source, path, bytes, sha256 }) => ({ source, path, bytes, sha256 }));
  }

  /** Cheap check after each step: size, modification time and inode of every file read so far. */
  checkStat(when: string): void {
    for (const s of this.seen.values()) {
      let now;
      try {
        now = statSync(s.path);
      } catch {
        throw new InputChanged(`source ${s.source}: ${s.path} was removed during the run (noticed ${when}); nothing was published.`);
      }
      if (now.size !== s.bytes || now.mtimeMs !== s.mtimeMs || now.ino !== s.ino) {
        throw new InputChanged(`source ${s.source}: ${s.path} changed during the run (noticed ${when}: ${describe({ size: s.bytes, mtimeMs: s.mtimeMs, ino: s.ino }, now)}); the outputs may mix two versions of it, so nothing was published. Run again when the file is stable.`);
      }
    }
  }

  /** Before publishing: every file hashed again and compared with what the manifest records. */
  async verifyHashes(): Promise<void> {
    this.checkStat("before publishing");
    await Promise.all([...this.seen.values()].map(async (s) => {
      const h = await sha256File(s.path);
      if (h !== s.sha256) {
        throw new InputChanged(`source ${s.source}: ${s.path} changed during the run (SHA-256 ${s.sha256.slice(0, 12)}… when read, ${h.slice(0, 12)}… now, same size and time); nothing was published. Run again when the file is stable.`);
      }
    }));
  }
}

function describe(a: { size: number; mtimeMs: number; ino?: number }, b: { size: number; mtimeMs: number; ino?: number }): string {
  const parts: string[] = [];
  if (a.size !== b.size) parts.push(`size ${a.size} → ${b.size} bytes`);
  if (a.mtimeMs !== b.mtimeMs) parts.push(`modified at ${new Date(b.mtimeMs).toISOString()}`);
  if (a.ino !== undefined && b.ino !== undefined && a.ino !== b.ino) parts.push("replaced by another file");
  return parts.join(", ") || "changed";
}
