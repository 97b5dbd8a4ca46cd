import type { Command } from "commander";
import { exitCodeOf } from "../errors.js";
import { mergeShards } from "../run/merge.js";
import type { RunReport } from "../run/runner.js";
import { Progress } from "../run/progress.js";
import { reportText } from "../run/report-text.js";
import { fail, parsePath, parseSize, parseThreads } from "./common.js";

export function registerMerge(program: Command): void {
  program
    .command("merge")
    .description("merge the run directories of a sharded run's shards (cairn run --shard K/N) into one run directory or release, equal to a run on one machine")
    .argument("<shard_dir...>", "the run directory of every shard 0…N−1")
    .option("--out <dir>", "the merged run directory (default runs/<pipeline>/<UTC timestamp>/)", parsePath)
    .option("--replace", "swap an existing --out directory for the merged run", false)
    .option("--release <id>", "publish as this release into the catalog (--catalog, or catalog: in the pipeline file)")
    .option("--catalog <dir>", "the catalog folder of releases", parsePath)
    .option("--provisional", "mark the release provisional", false)
    .option("--against <dir>", "compare with this run directory (revisions) instead of the catalog's latest release", parsePath)
    .option("--quiet", "no progress on stderr", false)
    .option("--json", "print a machine-readable summary on stdout", false)
    .option("--threads <n>", "DuckDB threads, 1 to 1024 (default: all cores)", parseThreads)
    .option("--memory-limit <size>", "DuckDB memory limit, e.g. 6GB", parseSize)
    .option("--temp-dir <dir>", "where DuckDB spills (default: inside the staging directory)", parsePath)
    .option("--no-report", "do not write report.html into the run directory")
    .action(async (dirs: string[], o: { out?: string; replace: boolean; release?: string; catalog?: string; provisional: boolean; against?: string;
      quiet: boolean; json: boolean; threads?: number; memoryLimit?: string; tempDir?: string; report: boolean }) => {
      let report: RunReport;
      try {
        report = await mergeShards(dirs, {
          out: o.out, replace: o.replace, release: o.release, catalog: o.catalog, provisional: o.provisional, against: o.against,
          progress: Progress.forTerminal(o.quiet || o.json), threads: o.threads, memoryLimit: o.memoryLimit, tempDirectory: o.tempDir, report: o.report,
        });
      } catch (e) {
        fail(e, o.json, exitCodeOf(e));
      }
      if (o.json) process.stdout.write(JSON.stringify(report) + "\n");
      else process.stdout.write(`merged ${report.merged_from?.length ?? 0} shards\n` + reportText(report));
      if (report.status !== "ok") {
        process.stderr.write(`cairn: ${report.error}\n`);
        process.exit(report.exit_code);
      }
    });
}
