#!/usr/bin/env node
/** cairn command line: thin; parses flags, calls the library, prints. */
import { Command } from "commander";
import { exitCodeOf } from "../errors.js";
import { TOOL_VERSION } from "../run/runner.js";
import { registerRun } from "./run.js";
import { registerCheck } from "./check.js";
import { registerSchema } from "./schema.js";
import { registerDemo } from "./demo.js";

const program = new Command();
program
  .name("cairn")
  .description("Material-stock accounting: apparent consumption, cohort models, audits and publishing on embedded DuckDB.")
  .version(TOOL_VERSION)
  .showHelpAfterError()
  .addHelpText("after", "\nExit codes: 0 success, 1 internal error, 2 invalid pipeline file or invocation, 3 bad input data, 4 an audit of severity error failed.");
program.exitOverride((err) => {
  process.exit(err.exitCode === 0 ? 0 : 2);
});
registerRun(program);
registerCheck(program);
registerSchema(program);
registerDemo(program);

program.parseAsync(process.argv).catch((e: unknown) => {
  process.stderr.write(`cairn: ${(e as Error).message ?? String(e)}\n`);
  process.exit(exitCodeOf(e));
});
