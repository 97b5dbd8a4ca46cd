/**
 * A catalog of releases: a folder whose `<ID>/` subfolders are ordinary run directories, and an
 * index, `catalog.json`, listing every published release (id, times, pipeline and tool
 * versions, input hashes, audit summary, status) and which one is the latest.
 *
 * - One refresh at a time: the catalog's lock (`.catalog.lock`, publish/lock.ts) is held for the
 *   whole release; a second refresh of the same catalog stops at once with exit 5.
 * - The index is replaced atomically (written beside it, then renamed over it), and only after
 *   the release directory is in place; a release that fails, is killed or runs out of disk
 *   never reaches the index, which stays as it was (its staging is kept as `<ID>.failed`).
 */
import { closeSync, existsSync, fsyncSync, mkdirSync, openSync, readdirSync, readFileSync, renameSync, rmSync, writeSync } from "node:fs";
import path from "node:path";
import { PipelineError } from "../errors.js";
import { Lock } from "./lock.js";

export const INDEX_FILE = "catalog.json";
export const RELEASE_ID = /^[A-Za-z0-9][A-Za-z0-9._-]{0,99}$/;

export interface ReleaseEntry {
  id: string;
  started_at: string;
  finished_at: string;
  status: "published";
  /** Audit items failed, by severity (errors are 0 for a published release). */
  audit: { errors: number; warnings: number };
  pipeline: { name: string; sha256: string; file: string };
  tool_version: string;
  engine: string;
  inputs: { source: string; path: string; bytes: number; sha256: string }[];
  /** The release this one was compared with (revisions), if any. */
  previous: string | null;
  /** Steps taken unchanged from the previous release. */
  reused: string[];
  provisional: boolean;
}

export interface CatalogIndex {
  format: "cairn-catalog";
  version: 1;
  latest: string | null;
  releases: ReleaseEntry[];
}

export class Catalog {
  private lock: Lock | null = null;
  constructor(readonly dir: string) {}

  get indexFile(): string {
    return path.join(this.dir, INDEX_FILE);
  }

  static checkId(id: string): void {
    if (!RELEASE_ID.test(id)) {
      throw new PipelineError(`--release ${JSON.stringify(id)}: a release id is 1 to 100 letters, digits, '.', '_' or '-', starting with a letter or digit (e.g. 2025-06 or r12)`);
    }
  }

  /** Takes the catalog's lock for a whole release (exit 5 when another refresh holds it). */
  acquire(): void {
    mkdirSync(this.dir, { recursive: true });
    this.lock = Lock.acquire(path.join(this.dir, ".catalog.lock"), path.resolve(this.dir), "catalog");
  }

  release(): void {
    this.lock?.release();
    this.lock = null;
  }

  read(): CatalogIndex {
    if (!existsSync(this.indexFile)) return { format: "cairn-catalog", version: 1, latest: null, releases: [] };
    let idx: CatalogIndex;
    try {
      idx = JSON.parse(readFileSync(this.indexFile, "utf8")) as CatalogIndex;
    } catch (e) {
      throw new PipelineError(`${this.indexFile}: not a readable catalog index (${(e as Error).message}); restore it from a backup or move the folder aside`);
    }
    if (idx.format !== "cairn-catalog") throw new PipelineError(`${this.indexFile}: not a cairn catalog index`);
    return idx;
  }

  latestDir(): string | null {
    const idx = this.read();
    return idx.latest ? path.join(this.dir, idx.latest) : null;
  }

  /** Adds (or replaces) a release and makes it the latest: written beside the index, then renamed over it. */
  publish(entry: ReleaseEntry): void {
    const idx = this.read();
    idx.releases = [...idx.releases.filter((r) => r.id !== entry.id), entry];
    idx.latest = entry.id;
    const tmp = `${this.indexFile}.tmp-${process.pid}`;
    const fd = openSync(tmp, "w");
    try {
      writeSync(fd, JSON.stringify(idx, null, 2) + "\n");
      fsyncSync(fd);
    } finally {
      closeSync(fd);
    }
    renameSync(tmp, this.indexFile);
  }

  /** Failed attempts kept beside the releases (not in the index). */
  failedAttempts(): string[] {
    if (!existsSync(this.dir)) return [];
    return readdirSync(this.dir).filter((f) => f.endsWith(".failed") || /\.failed-\d+$/.test(f)).sort();
  }

  /** Index temporaries left by a killed process (never the index itself). */
  cleanTemporaries(): void {
    if (!existsSync(this.dir)) return;
    for (const f of readdirSync(this.dir)) if (f.startsWith(`${INDEX_FILE}.tmp-`)) rmSync(path.join(this.dir, f), { force: true });
  }
}
