#!/usr/bin/env node
/** cairn command line: thin; parses flags, calls the library, prints. */
import { Command } from "commander";
import { exitCodeOf } from "../errors.js";
import { TOOL_VERSION } from "../run/runner.js";
import { registerRun } from "./run.js";
import { registerCheck } from "./check.js";
import { registerSchema } from "./schema.js";
import { registerDemo } from "./demo.js";
import { registerReleases } from "./releases.js";
import { registerPlan } from "./plan.js";
import { registerDiff } from "./diff.js";
import { registerDescribe } from "./describe.js";
import { registerReport } from "./report.js";
import { registerMerge } from "./merge.js";
import { registerSubmit } from "./submit.js";
import { registerStatus } from "./status.js";

// Output piped into a program that stops reading (head, say) ends the command quietly.
process.stdout.on("error", (e: NodeJS.ErrnoException) => {
  if (e.code === "EPIPE") process.exit(0);
  throw e;
});

const program = new Command();
program
  .name("cairn")
  .description("Material-stock accounting: apparent consumption, cohort models, audits and publishing on embedded DuckDB.")
  .version(TOOL_VERSION)
  .showHelpAfterError()
  .addHelpText("after", "\nExit codes: 0 success, 1 internal error, 2 invalid pipeline file or invocation, 3 bad input data, 4 an audit of severity error failed, 5 target or catalog busy, 6 out of memory, 7 out of disk, 8 an input changed during the run, 9 a sharded run or cluster job failed.");
program.exitOverride((err) => {
  process.exit(err.exitCode === 0 ? 0 : 2);
});
registerRun(program);
registerCheck(program);
registerSchema(program);
registerDemo(program);
registerPlan(program);
registerReleases(program);
registerDiff(program);
registerDescribe(program);
registerReport(program);
registerMerge(program);
registerSubmit(program);
registerStatus(program);

program.parseAsync(process.argv).catch((e: unknown) => {
  process.stderr.write(`cairn: ${(e as Error).message ?? String(e)}\n`);
  process.exit(exitCodeOf(e));
});
