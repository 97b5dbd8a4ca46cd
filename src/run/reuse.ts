/**
 * Re-use of unchanged work. With a previous run (the catalog's latest release, or a run
 * directory given with --reuse-from), a step whose fingerprint is unchanged is not computed
 * again: its published files are linked (or copied) from the previous run after their SHA-256
 * is checked against its manifest, later steps read them as views, and its audit rows are taken
 * over. The result is byte-identical to a full run (tested), since runs are deterministic.
 * A step is re-used only when every one of its outputs was published there, and no later
 * computed step continues it (that needs its end state, which is kept in memory only).
 */
import { copyFileSync, existsSync, linkSync, mkdirSync, readFileSync } from "node:fs";
import path from "node:path";
import { ident, lit } from "../engine/sql.js";
import type { Session } from "../engine/session.js";
import type { Plan } from "../plan/build.js";
import type { NodePrint } from "../plan/fingerprint.js";
import { sha256 } from "../publish/parquet.js";
import { AUDIT_TABLE } from "../audit/log.js";
import { REJECTS_TABLE } from "../sources/load.js";

export interface PreviousRun {
  dir: string;
  manifest: {
    status: string;
    steps?: { id: string; fingerprint?: string; method_fingerprint?: string; options_fingerprint?: string; outputs: { name: string }[] }[];
    sources?: { name: string; fingerprint?: string; method_fingerprint?: string; [k: string]: unknown }[];
    outputs: { table: string; file: string; sha256: string; rows: number; bytes: number; step?: string; role?: string; format?: string }[];
    inputs?: { source: string; path: string; sha256: string }[];
    [k: string]: unknown;
  };
}

export function readPrevious(dir: string | null | undefined): PreviousRun | null {
  if (!dir) return null;
  const file = path.join(dir, "manifest.json");
  if (!existsSync(file)) return null;
  const manifest = JSON.parse(readFileSync(file, "utf8")) as PreviousRun["manifest"];
  return manifest.status === "ok" ? { dir: path.resolve(dir), manifest } : null;
}

/** Steps whose outputs can be taken from the previous run, in plan order. */
export function reusableSteps(plan: Plan, prints: Map<string, NodePrint>, prev: PreviousRun): Set<string> {
  const ok = new Set<string>();
  const prevSteps = new Map((prev.manifest.steps ?? []).map((s) => [s.id, s]));
  for (const n of plan.steps) {
    const p = prevSteps.get(n.id);
    if (!p || p.fingerprint !== prints.get(n.id)?.fingerprint) continue;
    const files = prev.manifest.outputs.filter((o) => n.outputs.some((d) => d.name === o.table));
    const published = n.outputs.every((d) => files.some((f) => f.table === d.name));
    if (!published) continue;
    if (!files.every((f) => existsSync(path.join(prev.dir, f.file)))) continue;
    ok.add(n.id);
  }
  // A computed step that continues a model needs that model's end state: the model is computed too.
  for (const n of [...plan.steps].reverse()) {
    const c = (n.step as { continues?: { step: string } }).continues?.step;
    if (c && !ok.has(n.id)) ok.delete(c);
  }
  return ok;
}

/** Links (or copies) a step's published files into the staging directory, checking each SHA-256. */
export function takeFiles(prev: PreviousRun, tables: string[], staging: string): PreviousRun["manifest"]["outputs"] {
  const files = prev.manifest.outputs.filter((o) => tables.includes(o.table));
  for (const f of files) {
    const from = path.join(prev.dir, f.file);
    const to = path.join(staging, f.file);
    if (sha256(from) !== f.sha256) throw new Error(`re-use: ${from} does not match the SHA-256 its manifest records`);
    mkdirSync(path.dirname(to), { recursive: true });
    try {
      linkSync(from, to);
    } catch {
      copyFileSync(from, to);
    }
  }
  return files;
}

/** A view over a table's files, so later steps read it as if computed. */
export async function viewOver(s: Session, table: string, files: string[]): Promise<void> {
  await s.run(`CREATE OR REPLACE VIEW ${ident(table)} AS SELECT * FROM read_parquet([${files.map(lit).join(", ")}])`);
}

/** The previous run's audit rows of a step (or a source), taken over with this run's step index. */
export async function takeAudit(s: Session, prev: PreviousRun, step: string, stepIndex: number): Promise<void> {
  const file = path.join(prev.dir, "audit.parquet");
  await s.run(`INSERT INTO ${AUDIT_TABLE} SELECT ${stepIndex}, step, "check", severity, status, row_kind, keys, year, observed, expected, residual,
      tolerance, unit, items, failed, worst_residual, worst_failing_residual, message FROM read_parquet(${lit(file)}) WHERE step = ${lit(step)} AND "check" NOT LIKE 'revision:%'`); // revisions belong to their release, not to the step
}

/** The previous run's rejected rows of a source that is not loaded again. */
export async function takeRejects(s: Session, prev: PreviousRun, source: string): Promise<void> {
  await s.run(`INSERT INTO ${REJECTS_TABLE} SELECT * FROM read_parquet(${lit(path.join(prev.dir, "rejects.parquet"))}) WHERE source = ${lit(source)}`);
}
