import type { Command } from "commander";
import { exitCodeOf } from "../errors.js";
import { loadPipeline, parseSet } from "../spec/load.js";
import { runPipeline, type RunReport } from "../run/runner.js";
import { Progress } from "../run/progress.js";
import { collect, fail, parsePath, parseSize, parseThreads } from "./common.js";
import { parseShard } from "../run/shard.js";

import { reportText as printReport } from "../run/report-text.js";
export { printReport };

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
    .option("--release <id>", "publish as this release into the catalog (--catalog, or catalog: in the pipeline file)")
    .option("--catalog <dir>", "the catalog folder of releases", parsePath)
    .option("--provisional", "mark the release provisional", false)
    .option("--against <dir>", "compare with this run directory (revisions) instead of the catalog's latest release", parsePath)
    .option("--reuse-from <dir>", "take unchanged steps from this run directory (default: the previous release)", parsePath)
    .option("--no-reuse", "compute every step, even those unchanged since the previous run")
    .option("--no-report", "do not write report.html into the run directory")
    .option("--shard <K/N>", "run shard K (from 0) of N: the steps that run per key, on this shard's keys (see cairn merge, cairn submit)")
    .option("--shard-by <column>", "the key the shards split (with --shard)", "region")
    .action(async (file: string, o: { out?: string; replace: boolean; set: string[]; quiet: boolean; json: boolean; threads?: number; memoryLimit?: string; tempDir?: string;
      release?: string; catalog?: string; provisional: boolean; against?: string; reuseFrom?: string; reuse: boolean; report: boolean; shard?: string; shardBy: string }) => {
      let report: RunReport;
      try {
        const shard = o.shard !== undefined ? { ...parseShard(o.shard), by: o.shardBy } : undefined;
        const lp = loadPipeline(file, parseSet(o.set));
        report = await runPipeline(lp, {
          out: o.out, replace: o.replace, progress: Progress.forTerminal(o.quiet || o.json),
          threads: o.threads, memoryLimit: o.memoryLimit, tempDirectory: o.tempDir,
          release: o.release, catalog: o.catalog, provisional: o.provisional, against: o.against, reuseFrom: o.reuseFrom, reuse: o.reuse, report: o.report, shard,
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
