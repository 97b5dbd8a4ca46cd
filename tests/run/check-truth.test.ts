/**
 * `check` tells the truth: every pipeline of the broken corpus goes through `check` and then
 * `run`; none may pass `check` and then be refused by `run` as an invalid pipeline (exit 2), and
 * each gives the exit code and message it should.
 */
import { describe, expect, it } from "vitest";
import path from "node:path";
import { loadPipeline } from "../../src/spec/load.js";
import { checkPipeline } from "../../src/run/check.js";
import { runPipeline } from "../../src/run/runner.js";
import { exitCodeOf } from "../../src/errors.js";
import { BROKEN, writeCase } from "../fixtures/broken.js";

async function checkCode(file: string): Promise<{ code: number; message: string }> {
  try {
    await checkPipeline(loadPipeline(file));
    return { code: 0, message: "" };
  } catch (e) {
    return { code: exitCodeOf(e), message: (e as Error).message };
  }
}

async function runCode(file: string): Promise<{ code: number; message: string }> {
  try {
    const r = await runPipeline(loadPipeline(file), { out: path.join(path.dirname(file), "out") });
    return { code: r.exit_code, message: r.error ?? "" };
  } catch (e) {
    return { code: exitCodeOf(e), message: (e as Error).message };
  }
}

describe("check and run agree on every pipeline of the broken corpus", () => {
  for (const c of BROKEN) {
    it(c.name, async () => {
      const file = writeCase(c);
      const chk = await checkCode(file);
      const run = await runCode(file);
      expect(!(chk.code === 0 && run.code === 2), `check passed but run refused the file: ${run.message}`).toBe(true);
      expect(chk.code, chk.message).toBe(c.check);
      expect(run.code, run.message).toBe(c.run);
      expect(chk.code ? chk.message : run.message).toMatch(c.message);
    }, 60_000);
  }
});
