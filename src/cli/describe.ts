import type { Command } from "commander";
import { existsSync, readFileSync } from "node:fs";
import path from "node:path";
import { exitCodeOf, PipelineError } from "../errors.js";
import { dictionaryText, type DictTable } from "../publish/dictionary.js";
import { fail } from "./common.js";

export function registerDescribe(program: Command): void {
  program
    .command("describe")
    .description("print the data dictionary of a run directory: every published table and column with type, unit, meaning, and the codes of key columns")
    .argument("<run_dir>", "a cairn run directory")
    .option("--table <name>", "only this table")
    .option("--json", "print the dictionary as JSON", false)
    .action((dir: string, o: { table?: string; json: boolean }) => {
      try {
        const file = path.join(dir, "dictionary.json");
        if (!existsSync(file)) throw new PipelineError(`${dir}: no dictionary.json; not a cairn run directory (or one made before data dictionaries existed)`);
        const d = JSON.parse(readFileSync(file, "utf8")) as { pipeline: string; caution: string; tables: DictTable[] };
        const tables = d.tables.filter((t) => !o.table || t.name === o.table);
        if (o.table && !tables.length) throw new PipelineError(`--table ${o.table}: not a published table of ${dir} (tables: ${d.tables.map((t) => t.name).join(", ")})`);
        if (o.json) process.stdout.write(JSON.stringify({ ...d, tables }) + "\n");
        else process.stdout.write(`data dictionary of ${dir} (pipeline ${d.pipeline})\n${d.caution}\n\n${dictionaryText(tables)}`);
      } catch (e) {
        fail(e, o.json, exitCodeOf(e));
      }
    });
}
