import type { Command } from "commander";
import { exitCodeOf } from "../errors.js";
import { loadPipeline, parseSet } from "../spec/load.js";
import { runPipeline, type RunReport } from "../run/runner.js";
import { Progress } from "../run/progress.js";
import { collect, fail, parsePath, parseSize, parseThreads } from "./common.js";

export function printReport(r: RunReport): string {
  const lines: string[] = [];
  lines.push(r.status === "ok" ? `run complete: ${r.run_dir}` : `run FAILED (exit ${r.exit_code}); kept for inspection: ${r.run_dir}`);
  if (r.error) lines.push(r.error);
  for (const s of r.sources) lines.push(`  source ${s.name}: ${s.rows_loaded} rows loaded, ${s.rows_rejected} rejected, ${s.rows_filtered} filtered out`);
  for (const o of r.outputs) lines.push(`  wrote ${o.file} (${o.rows} rows)`);
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

export function registerRun(program: Command): void {
  program
    .command("run")
    .description("run a pipeline file and publish its tables, audit table and manifest into a run directory")
    .argument("<file>", "the pipeline file (YAML)")
    .option("--out <dir>", "the run directory itself (default runs/<pipeline>/<UTC timestamp>/)", parsePath)
    .option("--replace", "swap an existing --out directory for the new run", false)
    .option("--set <name=value>", "give a variable used as ${NAME} in the file (repeatable)", collect, [] as string[])
    .option("--quiet", "no progress on stderr", false)
    .option("--json", "print a machine-readable summary on stdout", false)
    .option("--threads <n>", "DuckDB threads, 1 to 1024 (default: all cores)", parseThreads)
    .option("--memory-limit <size>", "DuckDB memory limit, e.g. 6GB; beyond it DuckDB spills to disk", parseSize)
    .option("--temp-dir <dir>", "where DuckDB spills (default: inside the staging directory)", parsePath)
    .action(async (file: string, o: { out?: string; replace: boolean; set: string[]; quiet: boolean; json: boolean; threads?: number; memoryLimit?: string; tempDir?: string }) => {
      let report: RunReport;
      try {
        const lp = loadPipeline(file, parseSet(o.set));
        report = await runPipeline(lp, {
          out: o.out, replace: o.replace, progress: Progress.forTerminal(o.quiet || o.json),
          threads: o.threads, memoryLimit: o.memoryLimit, tempDirectory: o.tempDir,
        });
      } catch (e) {
        fail(e, o.json, exitCodeOf(e));
      }
      if (o.json) process.stdout.write(JSON.stringify(report) + "\n");
      else process.stdout.write(printReport(report));
      if (report.status !== "ok") {
        process.stderr.write(`cairn: ${report.error}\n`);
        process.exit(report.exit_code);
      }
    });
}
