import type { Command } from "commander";
import { exitCodeOf } from "../errors.js";
import { loadPipeline, parseSet } from "../spec/load.js";
import { checkPipeline } from "../run/check.js";
import { collect, fail } from "./common.js";

export function registerCheck(program: Command): void {
  program
    .command("check")
    .description("validate a pipeline file and that every source exists and has its declared columns, without running")
    .argument("<file>", "the pipeline file (YAML)")
    .option("--set <name=value>", "give a variable used as ${NAME} in the file (repeatable)", collect, [] as string[])
    .option("--json", "print a machine-readable summary on stdout", false)
    .action(async (file: string, o: { set: string[]; json: boolean }) => {
      try {
        const lp = loadPipeline(file, parseSet(o.set));
        const r = await checkPipeline(lp);
        if (o.json) process.stdout.write(JSON.stringify({ status: "ok", ...r }) + "\n");
        else {
          process.stdout.write(`${file}: valid; ${r.sources.length} source(s), ${r.steps.length} step(s)\n`);
          for (const s of r.sources) process.stdout.write(`  source ${s.name}: ${s.files} file(s), columns ${s.columns.join(", ")}${s.rows !== undefined ? `; ${s.rows} rows read and checked` : ""}\n`);
          for (const s of r.steps) process.stdout.write(`  step ${s.id} (${s.kind}) reads ${s.reads.join(", ") || "-"}; produces ${s.outputs.map((o) => o.name).join(", ")}\n`);
        }
      } catch (e) {
        fail(e, o.json, exitCodeOf(e));
      }
    });
}
