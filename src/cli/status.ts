import type { Command } from "commander";
import { EXIT, exitCodeOf } from "../errors.js";
import { runStatus, statusText } from "../cluster/status.js";
import { fail } from "./common.js";

export function registerStatus(program: Command): void {
  program
    .command("status")
    .description("where a sharded run submitted with cairn submit stands: each shard and the merge, from their run directories and squeue")
    .argument("<dir>", "the --out of cairn submit (or its work folder DIR.shards)")
    .option("--json", "print the state as JSON", false)
    .action((dir: string, o: { json: boolean }) => {
      try {
        const s = runStatus(dir);
        process.stdout.write(o.json ? JSON.stringify(s) + "\n" : statusText(s));
        if (s.state === "failed" || s.state === "cancelled") process.exit(EXIT.cluster);
      } catch (e) {
        fail(e, o.json, exitCodeOf(e));
      }
    });
}
