import path from "node:path";
import { fileURLToPath } from "node:url";
import type { Command } from "commander";
import { exitCodeOf } from "../errors.js";
import { loadPipeline } from "../spec/load.js";
import { runPipeline } from "../run/runner.js";
import { Progress } from "../run/progress.js";
import { fail } from "./common.js";
import { printReport } from "./run.js";

/** The built-in demo pipeline, shipped with the package. */
export const DEMO_PIPELINE = path.resolve(path.dirname(fileURLToPath(import.meta.url)), "..", "..", "pipelines", "demo.yaml");

export function registerDemo(program: Command): void {
  program
    .command("demo")
    .description("run the built-in demo (invented regions and figures) into a run directory; the same as `cairn run` on pipelines/demo.yaml")
    .option("--out <dir>", "the run directory", "runs/demo")
    .option("--quiet", "no progress on stderr", false)
    .option("--json", "print a machine-readable summary on stdout", false)
    .action(async (o: { out: string; quiet: boolean; json: boolean }) => {
      try {
        const r = await runPipeline(loadPipeline(DEMO_PIPELINE), { out: o.out, replace: true, progress: Progress.forTerminal(o.quiet || o.json) });
        process.stdout.write(o.json ? JSON.stringify(r) + "\n" : printReport(r));
        if (r.status !== "ok") process.exit(r.exit_code);
      } catch (e) {
        fail(e, o.json, exitCodeOf(e));
      }
    });
}
