/** The run's summary as text: what `cairn run` prints and what run.log ends with. */
import type { RunReport } from "./runner.js";

export function reportText(r: RunReport): string {
  const lines: string[] = [];
  lines.push(r.status === "ok" ? `run complete: ${r.run_dir}${r.release ? ` (release ${r.release})` : ""}` : `run FAILED (exit ${r.exit_code}); kept for inspection: ${r.run_dir}`);
  if (r.error) lines.push(r.error);
  if (r.shard) lines.push(`  shard ${r.shard.index} of ${r.shard.count} (0-based), by ${r.shard.by}: ${r.shard.keys} of ${r.shard.of} values; merge every shard with cairn merge`);
  if (r.merged_from) lines.push(`  merged from ${r.merged_from.length} shards: ${r.merged_from.join(", ")}`);
  for (const s of r.sources) lines.push(`  source ${s.name}: ${s.rows_loaded} rows loaded, ${s.rows_rejected} rejected, ${s.rows_filtered} filtered out${s.reused ? " (unchanged, not read again)" : ""}`);
  if (r.reused.length) lines.push(`  re-used unchanged from the previous run: ${r.reused.join(", ")}`);
  for (const o of r.outputs) lines.push(`  wrote ${o.file} (${o.rows} rows)`);
  if (r.report) lines.push(`  wrote ${r.report} (open it in a browser: inputs, audit, charts, revisions, method)`);
  if (r.revisions.length) lines.push(`  revisions against the previous release: ${r.revisions.map((x) => `${x.table} ${x.rows}`).join(", ")}`);
  if (r.audit) {
    lines.push(`audit: ${r.audit.errors} error item(s), ${r.audit.warnings} warning item(s) failed`);
    const w = (x: number | null, u: string | null) => (x == null ? "-" : `${Number(x.toPrecision(3))}${u && u !== "1" ? ` ${u}` : ""}`);
    const sw = Math.max(4, ...r.audit.checks.map((c) => c.step.length));
    const cw = Math.max(5, ...r.audit.checks.map((c) => c.check.length));
    lines.push(`  ${"step".padEnd(sw)} ${"check".padEnd(cw)} ${"severity".padEnd(8)} ${"status".padEnd(6)} ${"items".padStart(8)} ${"failed".padStart(7)}  worst |residual| (failing)`);
    for (const c of r.audit.checks) {
      lines.push(`  ${c.step.padEnd(sw)} ${c.check.padEnd(cw)} ${c.severity.padEnd(8)} ${(c.status === "fail" ? "FAIL" : "pass").padEnd(6)} ${String(c.items).padStart(8)} ${String(c.failed).padStart(7)}  ${w(c.worst_residual, c.unit)}${c.failed ? ` (${w(c.worst_failing_residual, c.unit)})` : ""}`);
    }
    if (r.audit.worst.length) {
      lines.push("worst failing items:");
      for (const x of r.audit.worst) lines.push(`  ${x.step} ${x.check} ${JSON.stringify(x.keys)}${x.year != null ? ` ${x.year}` : ""}: ${x.message}`);
    }
  }
  lines.push("Results are estimates; see the manifest's method and caution before publishing.");
  return lines.join("\n") + "\n";
}
