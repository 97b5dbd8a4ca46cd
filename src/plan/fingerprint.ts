/**
 * Fingerprints of the plan's nodes, known before anything runs. A node's fingerprint is the
 * SHA-256 of: the tool version and the pipeline settings every step depends on (base unit,
 * years, audit options, reject limits); its kind and canonical options (keys sorted, defaults
 * applied); the fingerprints of the nodes it reads; and, for a source, the SHA-256 of each of
 * its files (their content, not their paths, so a release folder with equal files gives equal
 * fingerprints). An unchanged fingerprint means unchanged outputs (the runs are deterministic),
 * so the node's published files can be re-used.
 *
 * A second fingerprint, the method, leaves out the data sources' file contents (keeping the
 * small tables that configure steps: lifetimes, content, concordance, curves, groups,
 * anchors): a changed method fingerprint means the options or the configuring tables changed,
 * the "method" cause of a revision.
 */
import { createHash } from "node:crypto";
import type { Plan } from "./build.js";

export interface NodePrint {
  fingerprint: string;
  method: string;
  /** Options and settings only (no file content at all): a change here is a method change of every figure downstream. */
  options: string;
}

/** JSON with object keys sorted, so equal options give equal text. */
export function canonical(v: unknown): string {
  if (Array.isArray(v)) return `[${v.map(canonical).join(",")}]`;
  if (v && typeof v === "object") {
    return `{${Object.keys(v as object).sort().filter((k) => (v as Record<string, unknown>)[k] !== undefined)
      .map((k) => `${JSON.stringify(k)}:${canonical((v as Record<string, unknown>)[k])}`).join(",")}}`;
  }
  return JSON.stringify(v) ?? "null";
}

const sha = (...parts: string[]) => {
  const h = createHash("sha256");
  for (const p of parts) h.update(p).update("\u0000");
  return h.digest("hex");
};

/**
 * `fileHashes`: per source, the SHA-256 of its files in file order. Returns the prints of every
 * source and step, by name or id.
 */
export function fingerprints(plan: Plan, toolVersion: string, fileHashes: Map<string, string[]>): Map<string, NodePrint> {
  const p = plan.lp.pipeline;
  const settings = canonical({ tool: toolVersion, base_unit: p.base_unit, years: p.years ?? null, audit: p.audit, rejects: p.rejects ?? null });
  const out = new Map<string, NodePrint>();
  for (const s of plan.sources) {
    // The declaration without its path: a new release folder with the same files is the same input.
    const { path: _path, ...rest } = s.source;
    const decl = canonical(rest);
    const files = (fileHashes.get(s.name) ?? []).join(",");
    out.set(s.name, {
      fingerprint: sha(settings, "source", s.name, decl, files),
      // Data sources enter the method only by their declaration; small configuring tables by their content too.
      method: sha(settings, "source", s.name, decl, s.config ? files : "data"),
      options: sha(settings, "source", s.name, decl),
    });
  }
  for (const n of plan.steps) {
    const reads = n.reads.map((r) => {
      const from = plan.producer.get(r.table) ?? r.table;
      return `${r.option}=${r.table}@${out.get(from)?.fingerprint ?? "?"}`;
    });
    const readsMethod = n.reads.map((r) => {
      const from = plan.producer.get(r.table) ?? r.table;
      return `${r.option}=${r.table}@${out.get(from)?.method ?? "?"}`;
    });
    const readsOptions = n.reads.map((r) => {
      const from = plan.producer.get(r.table) ?? r.table;
      return `${r.option}=${r.table}@${out.get(from)?.options ?? "?"}`;
    });
    const opts = canonical(n.step);
    out.set(n.id, {
      fingerprint: sha(settings, "step", n.kind.kind, opts, ...reads),
      method: sha(settings, "step", n.kind.kind, opts, ...readsMethod),
      options: sha(settings, "step", n.kind.kind, opts, ...readsOptions),
    });
  }
  return out;
}

/**
 * The fingerprint of the whole plan: every source's and step's fingerprint, in plan order. Shards
 * of one sharded run must share it (same pipeline, options, tool version and input contents),
 * and the merge recomputes it from the files as they are then.
 */
export function planFingerprint(plan: Plan, prints: Map<string, NodePrint>): string {
  return sha("plan", canonical({
    sources: plan.sources.map((s) => [s.name, prints.get(s.name)?.fingerprint ?? null]),
    steps: plan.steps.map((n) => [n.id, prints.get(n.id)?.fingerprint ?? null]),
  }));
}
