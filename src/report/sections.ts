/** The report's text sections: title, inputs, audit, published tables, revisions, method and caution. */
import { existsSync } from "node:fs";
import path from "node:path";
import { lit } from "../engine/sql.js";
import type { RunReader } from "./data.js";
import { badge, esc, fmtBytes, fmtNum, html, num, table, yearCell, type Cell } from "./html.js";
import { PER_TABLE, type RevisionReport } from "./revisions.js";

export interface RunManifest {
  tool?: { name: string; version: string };
  engine?: { duckdb?: string; node?: string };
  status: string;
  exit_code?: number;
  error?: string;
  started_at?: string;
  finished_at?: string;
  pipeline: { name: string; file?: string; sha256?: string; base_unit?: string };
  release?: { id: string; provisional?: boolean; catalog?: string };
  previous?: { dir?: string; reused_from?: string | null } | null;
  method?: Record<string, string>;
  caution?: string;
  inputs?: { source: string; path: string; bytes: number; sha256: string; rows: number | null }[];
  sources?: { name: string; rows_read?: number; rows_rejected?: number; rows_filtered?: number; rows_loaded?: number; year_max?: number }[];
  outputs: { table: string; file: string; rows: number; bytes?: number; sha256?: string; step?: string; role?: string; format?: string }[];
  steps?: { id: string; kind: string; reused?: boolean }[];
  rejects?: number;
  audit?: { rows: number; errors: number; warnings: number; checks?: { status: string; severity: string }[] };
}

const short = (h: string | undefined) => (h ? h.slice(0, 12) : "—");
const shortHash = (h: string | undefined): Cell => html(`<code title="${esc(h ?? "")}">${esc(short(h))}</code>`);
const utc = (s: string | undefined) => (s ? s.replace("T", " ").replace(/\.\d+Z$/, " UTC").replace(/Z$/, " UTC") : "—");

export function titleSection(m: RunManifest, dir: string): string {
  const dur = m.started_at && m.finished_at ? (Date.parse(m.finished_at) - Date.parse(m.started_at)) / 1000 : null;
  const rel = m.release ? `<li>release <strong>${esc(m.release.id)}</strong>${m.release.provisional ? ' <span class="badge prov">provisional</span>' : ""}</li>` : "";
  const meta = [
    `<li>run ${esc(utc(m.started_at))}${dur !== null ? ` (${dur.toFixed(1)} s)` : ""}</li>`,
    rel,
    `<li>status ${badge(m.status)}</li>`,
    `<li>${esc(m.tool?.name ?? "cairn")} ${esc(m.tool?.version ?? "?")}</li>`,
    `<li>DuckDB ${esc(m.engine?.duckdb ?? "?")}, Node ${esc(m.engine?.node ?? "?")}</li>`,
  ].join("");
  const failed = m.status !== "ok" ? `<p class="notice bad"><strong>This run failed</strong> (exit code ${esc(m.exit_code ?? "?")}): ${esc(m.error ?? "no message")}. Only what it wrote is shown.</p>` : "";
  return `<header class="top"><h1>${esc(m.pipeline.name)}${m.release ? ` — release ${esc(m.release.id)}` : ""}</h1>
<ul class="meta">${meta}</ul>
<p class="muted">Run directory <code>${esc(dir)}</code>; pipeline file <code>${esc(m.pipeline.file ?? "—")}</code> (SHA-256 <code title="${esc(m.pipeline.sha256 ?? "")}">${esc(short(m.pipeline.sha256))}</code>); base unit ${esc(m.pipeline.base_unit ?? "—")}${m.previous?.dir ? `; previous run <code>${esc(m.previous.dir)}</code>` : ""}.</p></header>
${failed}<p class="notice"><strong>All figures are estimates</strong>, not measurements: see <a href="#method">method and caution</a> before using or publishing them.</p>`;
}

/** The run at a glance: audit, inputs, published tables, revisions, charts. */
export function glance(m: RunManifest, rev: RevisionReport | null, charts: number): string {
  const a = m.audit;
  const checks = a?.checks ?? [];
  const failing = checks.filter((c) => c.status === "fail");
  const loaded = (m.sources ?? []).reduce((n, s) => n + (s.rows_loaded ?? 0), 0);
  const rejected = (m.sources ?? []).reduce((n, s) => n + (s.rows_rejected ?? 0), 0);
  const tables = new Set(m.outputs.filter((o) => o.step && (o.role === "main" || o.role === "detail")).map((o) => o.table));
  const revised = rev ? rev.tables.reduce((n, t) => n + t.rows, 0) : null;
  const item = (k: string, v: string, cls = "") => `<div class="kv${cls ? ` ${cls}` : ""}"><dt>${esc(k)}</dt><dd>${v}</dd></div>`;
  return `<dl class="glance">
${item("Audit", `${esc(a?.errors ?? 0)} error and ${esc(a?.warnings ?? 0)} warning item(s) failed; ${esc(failing.length)} of ${esc(checks.length)} checks failing`, a?.errors ? "bad" : failing.length ? "warn" : "good")}
${item("Inputs", `${esc((m.sources ?? []).length)} sources, ${esc((m.inputs ?? []).length)} files; ${esc(fmtNum(loaded))} rows loaded, ${esc(fmtNum(rejected))} rejected`, rejected ? "warn" : "")}
${item("Published", `${esc(tables.size)} tables`)}
${item("Revisions", rev ? `${esc(fmtNum(revised ?? 0))} figure(s) revised against <code>${esc(rev.against ? path.basename(rev.against) : "the previous release")}</code>` : "no previous release")}
${item("Charts", `${esc(charts)}`)}
</dl>`;
}

export async function inputsSection(r: RunReader, m: RunManifest): Promise<string> {
  const inputs = m.inputs ?? [];
  const sources = (m.sources ?? []).map((s) => {
    const files = inputs.filter((i) => i.source === s.name).map((i) => `<code title="${esc(i.path)}">${esc(path.basename(i.path))}</code>`).join(", ");
    return [s.name, html(files || "—"), num(s.rows_read), num(s.rows_rejected), num(s.rows_filtered), num(s.rows_loaded), yearCell(s.year_max)] as Cell[];
  });
  const files = inputs.map((i) => [i.source, html(`<code title="${esc(i.path)}">${esc(i.path)}</code>`), num(i.bytes), esc(fmtBytes(i.bytes)), shortHash(i.sha256), num(i.rows)] as Cell[]);
  let rejects = `<p>${m.rejects ? `${esc(m.rejects)} row(s) were rejected` : "No row was rejected"} (rejects.parquet).</p>`;
  const file = path.join(r.dir, "rejects.parquet");
  if (m.rejects && existsSync(file)) {
    const rows = await r.all(`SELECT * FROM read_parquet(${lit(file)}) LIMIT 20`);
    const cols = rows.length ? Object.keys(rows[0]!) : [];
    rejects += table({ caption: `The first ${rows.length} rejected rows`, headers: cols, rows: rows.map((x) => cols.map((c) => (typeof x[c] === "number" ? num(x[c]) : String(x[c] ?? "—")))) });
  }
  return `<section id="inputs"><h2>Inputs</h2>
${table({ caption: "Sources", headers: ["source", "files", "rows read", "rejected", "filtered out", "loaded", "newest year"], numeric: [2, 3, 4, 5, 6], rows: sources, cls: "sources" })}
${table({ caption: "Input files", headers: ["source", "file", "bytes", "size", "SHA-256", "rows"], numeric: [2, 3, 5], rows: files, cls: "files" })}
${rejects}</section>`;
}

/** The residual's unit as a suffix ("1" is a plain number). */
const unitSuffix = (u: unknown) => (u && u !== "1" ? String(u) : "");

export async function auditSection(r: RunReader, m: RunManifest, maxItems = 50): Promise<string> {
  const file = path.join(r.dir, "audit.parquet");
  if (!existsSync(file)) return `<section id="audit"><h2>Audit</h2><p>This run directory has no audit.parquet.</p></section>`;
  const rel = `read_parquet(${lit(file)})`;
  const checks = await r.all(`SELECT step, "check", severity, status, items, failed, worst_residual, worst_failing_residual, unit FROM ${rel} WHERE row_kind = 'summary'`);
  const failing = Number((await r.all(`SELECT count(*) AS n FROM ${rel} WHERE row_kind = 'item' AND status = 'fail'`))[0]?.n ?? 0);
  const items = await r.all(`SELECT severity, step, "check",
      array_to_string(list_transform(map_entries(keys), e -> e.key || '=' || e.value), ', ') AS keys, year, residual, tolerance, unit, message
    FROM ${rel} WHERE row_kind = 'item' AND status = 'fail'
    ORDER BY severity = 'error' DESC, abs(residual) DESC NULLS LAST, step, "check", year LIMIT ${maxItems}`);
  const a = m.audit;
  const failedChecks = checks.filter((c) => c.status === "fail").length;
  const head = `<p>${esc(checks.length)} check(s), ${esc(failedChecks)} failing; ${esc(a?.errors ?? 0)} failing item(s) of severity error and ${esc(a?.warnings ?? 0)} of severity warning.</p>`;
  const rows = checks.map((c) => [c.step, c.check, c.severity, html(badge(String(c.status))), num(c.items), num(c.failed),
    num(c.worst_residual, unitSuffix(c.unit)), num(c.worst_failing_residual, unitSuffix(c.unit))] as Cell[]);
  const itemRows = items.map((x) => [x.severity, x.step, x.check, x.keys || "—", yearCell(x.year), num(x.residual, unitSuffix(x.unit)), num(x.tolerance), x.message ?? ""] as Cell[]);
  return `<section id="audit"><h2>Audit</h2>${head}
${table({ caption: "Checks", headers: ["step", "check", "severity", "status", "items", "failed", "worst |residual|", "worst failing |residual|"], numeric: [4, 5, 6, 7], rows, cls: "checks" })}
${failing ? table({ caption: `Failing items, errors first, largest |residual| first (${items.length} of ${failing})`, headers: ["severity", "step", "check", "keys", "year", "residual", "tolerance", "message"], numeric: [4, 5, 6], rows: itemRows, cls: "failing" }) : "<p>No item failed.</p>"}
</section>`;
}

export function outputsSection(m: RunManifest): string {
  const rows = m.outputs.filter((o) => o.step && (o.role === "main" || o.role === "detail" || o.role === "export")).map((o) =>
    [o.table, o.step ?? "—", o.role ?? "—", o.format ?? "parquet", num(o.rows), html(`<code>${esc(o.file)}</code>`), num(o.bytes), shortHash(o.sha256)] as Cell[]);
  return `<section id="outputs"><h2>Published tables</h2>${table({ headers: ["table", "step", "role", "format", "rows", "file", "bytes", "SHA-256"], numeric: [4, 6], rows, cls: "outputs" })}</section>`;
}

export function revisionsSection(rev: RevisionReport | null, m: RunManifest): string {
  if (!rev) {
    const why = m.previous?.dir ? `the previous run directory ${m.previous.dir} no longer holds a completed run` : "this run has no previous release";
    return `<section id="revisions"><h2>Revisions</h2><p>No revisions: ${esc(why)}. Give <code>--against DIR</code> to compare with an earlier run directory.</p></section>`;
  }
  const basis = rev.basis === "own"
    ? `Revisions kept by this run (revisions/*.parquet), against ${rev.against ? `<code>${esc(rev.against)}</code>` : "the previous release"}; causes from the changed input rows.`
    : `Revisions computed for this report against <code>${esc(rev.against)}</code>; causes from the two manifests (changed sources upstream of each table, changed method).`;
  const causes = [...new Set(rev.tables.flatMap((t) => Object.keys(t.causes)))].sort();
  const summary = rev.tables.map((t) => [t.table, num(t.rows), ...causes.map((c) => num(t.causes[c] ?? 0)), num(t.maxAbs)] as Cell[]);
  const top = rev.top.map((x) => [x.table, x.keys || "—", yearCell(x.year), x.variable, num(x.previous), num(x.new), num(x.revision),
    x.relative_revision == null ? num(null) : { td: `<td class="num" data-value="${esc(String(x.relative_revision))}">${esc((100 * x.relative_revision).toFixed(2))}&#8239;%</td>` },
    x.cause, x.sources ?? "—"] as Cell[]);
  return `<section id="revisions"><h2>Revisions</h2><p>${basis} Values in each table's unit.</p>
${table({ caption: "Revised figures per table, by cause", headers: ["table", "revised", ...causes, "largest |revision|"], numeric: [...Array(causes.length + 2).keys()].map((i) => i + 1), rows: summary, cls: "revision-tables" })}
${top.length ? table({ caption: `The ${top.length} largest revisions by |revision| (at most ${PER_TABLE} from one table)`, headers: ["table", "keys", "year", "variable", "previous", "new", "revision", "relative", "cause", "sources"], numeric: [2, 4, 5, 6, 7], rows: top, cls: "revisions" }) : "<p>No figure was revised.</p>"}
</section>`;
}

export function methodSection(m: RunManifest): string {
  const method = Object.entries(m.method ?? {}).map(([k, v]) => `<dt>${esc(k.replace(/_/g, " "))}</dt><dd>${esc(v)}</dd>`).join("\n");
  return `<section id="method"><h2>Method and caution</h2>
<p class="notice"><strong>These figures are estimates.</strong> ${esc(m.caution ?? "They are model results, not measurements.")}</p>
${method ? `<dl class="method">${method}</dl>` : "<p>The manifest records no method text.</p>"}</section>`;
}
