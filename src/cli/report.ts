import type { Command } from "commander";
import { existsSync, renameSync, rmSync, statSync, writeFileSync } from "node:fs";
import path from "node:path";
import { exitCodeOf, PipelineError, ResourceError } from "../errors.js";
import { checkRunDir, renderReport } from "../report/report.js";
import { fail, parsePath } from "./common.js";

export function registerReport(program: Command): void {
  program
    .command("report")
    .description("write the HTML report of a run directory: inputs, audit, charts, revisions, method and caution (one self-contained file, no script)")
    .argument("<run_dir>", "the run directory (one with a manifest.json)")
    .option("--against <dir>", "an earlier run directory to compare with (default: the run's own revisions, else its previous run)", parsePath)
    .option("--out <file>", "where to write the report (default: RUN_DIR/report.html)", parsePath)
    .option("--quiet", "print only the path written", false)
    .action(async (dir: string, o: { against?: string; out?: string; quiet: boolean }) => {
      try {
        checkRunDir(dir);
        const out = path.resolve(o.out ?? path.join(dir, "report.html"));
        if (existsSync(out) && statSync(out).isDirectory()) throw new PipelineError(`--out ${o.out ?? out}: a folder; give a file name, e.g. ${path.join(out, "report.html")}`);
        if (!existsSync(path.dirname(out))) throw new PipelineError(`--out ${o.out ?? out}: the folder ${path.dirname(out)} does not exist; create it or give another path`);
        const html = await renderReport(dir, { against: o.against, progress: o.quiet ? undefined : (m) => process.stderr.write(`  ${m}\n`) });
        // Written beside the target and renamed into place: a reader never sees half a report.
        const tmp = `${out}.tmp-${process.pid}`;
        try {
          writeFileSync(tmp, html);
          renameSync(tmp, out);
        } catch (e) {
          rmSync(tmp, { force: true });
          if ((e as NodeJS.ErrnoException).code === "ENOSPC") throw new ResourceError(`--out ${out}: the disk is full: ${(e as Error).message}`, "disk");
          throw new PipelineError(`--out ${out}: cannot write the report (${(e as NodeJS.ErrnoException).code ?? (e as Error).message})`);
        }
        process.stdout.write(`${out}\n`);
      } catch (e) {
        fail(e, false, exitCodeOf(e));
      }
    });
}
