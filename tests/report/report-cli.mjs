// `cairn report` on its own, for tests: a program with only the report command registered
// (src/cli/main.ts registers it in the real CLI). Usage: node report-cli.mjs report RUN_DIR [...]
import { Command } from "commander";
import { registerReport } from "../../dist/cli/report.js";

const program = new Command().name("cairn").exitOverride((e) => process.exit(e.exitCode === 0 ? 0 : 2));
registerReport(program);
await program.parseAsync(process.argv);
