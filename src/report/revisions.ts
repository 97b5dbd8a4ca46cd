/**
 * Revisions for the report: the run's own revisions/*.parquet (computed at run time against the
 * previous release, with causes from the changed input rows), or, with --against or when the run
 * kept none, revisions computed here between the two run directories (causes from the manifests:
 * changed sources upstream of the table, changed method).
 */
import { existsSync } from "node:fs";
import path from "node:path";
import { PipelineError } from "../errors.js";
import { Session } from "../engine/session.js";
import { ident, lit } from "../engine/sql.js";
import { revisions, revisionsTable } from "../publish/revisions.js";
import { readPrevious, type PreviousRun } from "../run/reuse.js";
import type { TableSchema } from "../steps/types.js";
import { isParquet, type RunReader } from "./data.js";

const FIXED = ["variable", "previous", "new", "revision", "relative_revision", "cause", "sources"];

export interface RevisionTableSummary {
  table: string;
  rows: number;
  causes: Record<string, number>;
  maxAbs: number | null;
}

export interface RevisionRow {
  table: string;
  keys: string;
  year: number | null;
  variable: string;
  previous: number | null;
  new: number | null;
  revision: number | null;
  relative_revision: number | null;
  cause: string;
  sources: string | null;
}

export interface RevisionReport {
  /** How the revisions were found (own revisions, or computed against a directory). */
  basis: "own" | "computed";
  /** The earlier run directory. */
  against: string | null;
  tables: RevisionTableSummary[];
  top: RevisionRow[];
}

type All = (sql: string) => Promise<Record<string, unknown>[]>;

/** Tables compared: published by a step, not the large by-cohort tables, not lifetime tables (shares by age). */
function compared(m: PreviousRun["manifest"]): string[] {
  return [...new Set(m.outputs.filter((o) => o.step && isParquet(o) && (o.role === "main" || o.role === "detail") && !o.table.endsWith("_by_cohort") && !o.table.endsWith("_lifetimes")).map((o) => o.table))];
}

async function summarise(all: All, table: string, rel: string, top: number): Promise<{ summary: RevisionTableSummary; rows: RevisionRow[] }> {
  const causes: Record<string, number> = {};
  let rows = 0;
  let maxAbs: number | null = null;
  for (const x of await all(`SELECT cause, count(*) AS n, max(abs(revision)) AS m FROM ${rel} GROUP BY cause ORDER BY cause`)) {
    causes[String(x.cause)] = Number(x.n);
    rows += Number(x.n);
    if (x.m != null) maxAbs = Math.max(maxAbs ?? 0, Number(x.m));
  }
  const cols = (await all(`DESCRIBE SELECT * FROM ${rel}`)).map((c) => String(c.column_name));
  const keys = cols.filter((c) => !FIXED.includes(c) && c !== "year");
  const keyText = keys.length ? keys.map((k) => `${lit(k + "=")} || coalesce(CAST(${ident(k)} AS VARCHAR), 'NULL')`).join(` || ', ' || `) : "''";
  const got = await all(`SELECT ${keyText} AS __keys, ${cols.includes("year") ? "CAST(year AS INTEGER)" : "NULL"} AS __year, variable, previous, new, revision, relative_revision, cause, sources
    FROM ${rel} ORDER BY abs(coalesce(revision, 0)) DESC, variable LIMIT ${top}`);
  return {
    summary: { table, rows, causes, maxAbs },
    rows: got.map((x) => ({
      table, keys: String(x.__keys), year: x.__year == null ? null : Number(x.__year), variable: String(x.variable),
      previous: x.previous as number | null, new: x.new as number | null, revision: x.revision as number | null,
      relative_revision: x.relative_revision as number | null, cause: String(x.cause), sources: (x.sources as string | null) ?? null,
    })),
  };
}

/** The largest revisions over all tables, at most PER_TABLE from one table (so one large table does not fill the list). */
export const PER_TABLE = 5;

function merge(parts: { summary: RevisionTableSummary; rows: RevisionRow[] }[], top: number): Pick<RevisionReport, "tables" | "top"> {
  const rows = parts.flatMap((p) => p.rows.slice(0, PER_TABLE)).sort((a, b) => Math.abs(b.revision ?? 0) - Math.abs(a.revision ?? 0));
  return { tables: parts.map((p) => p.summary), top: rows.slice(0, top) };
}

/** The run's own revisions (revisions/<table>.parquet), or null when it kept none. */
async function own(r: RunReader, top: number): Promise<RevisionReport | null> {
  const revs = r.manifest.outputs.filter((o) => o.role === "revisions" && o.table.startsWith("revisions:") && isParquet(o));
  if (!revs.length) return null;
  const prev = (r.manifest.previous as { dir?: string } | null)?.dir ?? null;
  const keep = new Set(compared(r.manifest as unknown as PreviousRun["manifest"]));
  const parts = [];
  for (const o of revs) {
    const table = o.table.slice("revisions:".length);
    if (!keep.has(table)) continue;
    parts.push(await summarise((sql) => r.all(sql), table, r.table(o.table), PER_TABLE));
  }
  return { basis: "own", against: prev, ...merge(parts, top) };
}

/** Revisions between an earlier run directory and this one, computed here (as `cairn diff` does). */
async function computed(r: RunReader, earlier: PreviousRun, top: number): Promise<RevisionReport> {
  const B = r.manifest as unknown as PreviousRun["manifest"];
  const A = earlier.manifest;
  const s = await Session.open({ threads: 2 });
  try {
    const srcA = new Map((A.sources ?? []).map((x) => [x.name, x.fingerprint]));
    const changed = (B.sources ?? []).filter((x) => srcA.get(x.name) !== x.fingerprint).map((x) => x.name);
    const stepsA = new Map((A.steps ?? []).map((x) => [x.id, x]));
    const stepOf = (t: string) => B.steps?.find((x) => x.outputs.some((y) => y.name === t));
    const parts = [];
    for (const t of compared(B)) {
      const filesA = A.outputs.filter((x) => x.table === t && isParquet(x)).map((x) => path.join(earlier.dir, x.file));
      if (!filesA.length) continue;
      const filesB = B.outputs.filter((x) => x.table === t && isParquet(x)).map((x) => path.join(r.dir, x.file));
      const step = stepOf(t);
      await s.run(`CREATE OR REPLACE VIEW ${ident(t)} AS SELECT * FROM read_parquet([${filesB.map(lit).join(", ")}])`);
      const cols = await s.columns(t);
      const keys = ((step?.outputs.find((y) => y.name === t) as { keys?: string[] } | undefined)?.keys ?? []).filter((k) => cols.some((c) => c.name === k));
      const schema: TableSchema = { keys, columns: cols.map((c) => ({ name: c.name, type: c.type, description: "" })) };
      const methodChanged = Boolean(step && stepsA.get(step.id)?.method_fingerprint !== step.method_fingerprint);
      // Sources upstream of the table's step, among those whose fingerprints changed.
      const up = new Set<string>();
      const walk = (id: string, seen: Set<string>) => {
        if (seen.has(id)) return;
        seen.add(id);
        for (const rd of (B.steps?.find((x) => x.id === id) as { reads?: string[] } | undefined)?.reads ?? []) {
          const producer = B.steps?.find((x) => x.outputs.some((y) => y.name === rd));
          if (producer) walk(producer.id, seen);
          else up.add(rd);
        }
      };
      if (step) walk(step.id, new Set());
      await revisions(s, { table: t, step: step?.id ?? t, schema, previousFiles: filesA, methodChanged, changedSources: [], coarseSources: changed.filter((x) => up.has(x)) });
      parts.push(await summarise((sql) => s.all(sql), t, ident(revisionsTable(t)), PER_TABLE));
    }
    return { basis: "computed", against: earlier.dir, ...merge(parts, top) };
  } finally {
    s.close();
  }
}

/** The earlier run directory of --against, or an error (exit 2) saying what is wrong with it. */
export function checkAgainst(against: string): PreviousRun {
  if (!existsSync(against)) throw new PipelineError(`--against ${against}: no such directory; give the earlier run directory (one with a manifest.json)`);
  const A = readPrevious(against);
  if (!A) throw new PipelineError(`--against ${against}: not a completed cairn run directory (no manifest.json with status ok)`);
  return A;
}

/**
 * The revisions to report: against `against` when given; else the run's own revisions; else
 * against the manifest's previous run directory when it still exists; else null.
 */
export async function findRevisions(r: RunReader, against: string | undefined, top = 20): Promise<RevisionReport | null> {
  if (against !== undefined) return computed(r, checkAgainst(against), top);
  const mine = await own(r, top);
  if (mine) return mine;
  const prevDir = (r.manifest.previous as { dir?: string } | null)?.dir;
  const A = prevDir ? readPrevious(prevDir) : null;
  return A ? computed(r, A, top) : null;
}
