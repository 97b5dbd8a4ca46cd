import type { Command } from "commander";
import path from "node:path";
import { exitCodeOf } from "../errors.js";
import { Catalog } from "../publish/catalog.js";
import { fail } from "./common.js";

export function registerReleases(program: Command): void {
  program
    .command("releases")
    .description("list the releases of a catalog: id, time, status, audit summary, inputs; which one is the latest")
    .argument("<dir>", "the catalog folder")
    .option("--json", "print the catalog's index as JSON", false)
    .action((dir: string, o: { json: boolean }) => {
      try {
        const c = new Catalog(path.resolve(dir));
        const idx = c.read();
        const failed = c.failedAttempts();
        if (o.json) {
          process.stdout.write(JSON.stringify({ ...idx, failed_attempts: failed }) + "\n");
          return;
        }
        if (!idx.releases.length) process.stdout.write(`${dir}: no release yet\n`);
        for (const r of idx.releases) {
          process.stdout.write(`${r.id === idx.latest ? "*" : " "} ${r.id.padEnd(16)} ${r.finished_at}  ${r.status}${r.provisional ? " (provisional)" : ""}  ` +
            `audit: ${r.audit.errors} error, ${r.audit.warnings} warning item(s)  pipeline ${r.pipeline.name} ${r.pipeline.sha256.slice(0, 12)}…  tool ${r.tool_version}  ` +
            `${r.inputs.length} input file(s)${r.previous ? `  compared with ${r.previous}` : ""}${r.reused.length ? `  re-used ${r.reused.join(", ")}` : ""}\n`);
        }
        if (idx.latest) process.stdout.write(`latest: ${idx.latest}\n`);
        if (failed.length) process.stdout.write(`failed attempts kept for inspection (not releases): ${failed.join(", ")}\n`);
      } catch (e) {
        fail(e, o.json, exitCodeOf(e));
      }
    });
}
