/**
 * A real batch cluster: the one-node Slurm cluster of scripts/slurm-local.sh (started by
 * tests/cluster/setup.ts). `cairn submit` sends the demo (without Monte Carlo, so its cohort
 * models run in the shards) as a job array of 4 shards and a merge job; the test follows it with
 * `cairn status` (squeue and the run directories) and compares the merged run with a run on one
 * machine, byte for byte. A shard made to fail must stop the merge: Slurm cancels the merge job
 * (afterok with --kill-on-invalid-dep), and status and a merge by hand name the failed shard.
 */
import { describe, expect, inject, it } from "vitest";
import { existsSync, readFileSync } from "node:fs";
import path from "node:path";
import { tmp } from "../helpers.js";
import { cliAsync, demoWithoutMonteCarlo, differingFiles } from "./helpers.js";

const conf = inject("slurmConf");
const skip = inject("slurmSkip");
const error = inject("slurmError");

async function waitFor(out: string, env: Record<string, string>, seconds: number): Promise<Record<string, any>> {
  const until = Date.now() + seconds * 1000;
  for (;;) {
    const r = await cliAsync(["status", out, "--json"], env);
    const s = JSON.parse(r.stdout) as Record<string, any>;
    if (["done", "failed", "cancelled"].includes(s.state) && (s.state !== "failed" || s.merge.state !== "pending")) return s;
    if (Date.now() > until) throw new Error(`still ${s.state} after ${seconds} s: ${r.stdout}`);
    await new Promise((res) => setTimeout(res, 1000));
  }
}

describe("sharded runs on a real Slurm cluster", () => {
  if (error) {
    it("starts the local cluster", () => {
      throw new Error(error);
    });
    return;
  }
  if (!conf) {
    it.skip(`skipped: ${skip}`, () => {});
    return;
  }
  const env = { SLURM_CONF: conf };
  const dir = tmp("cairn-slurm-test-");
  const file = demoWithoutMonteCarlo(dir);

  it("the demo in 4 shards via cairn submit: a job array, a merge job after it, the same bytes as one machine", async () => {
    const out = path.join(dir, "merged");
    const sub = await cliAsync(["submit", file, "--slurm", "--shards", "4", "--out", out, "--time", "10", "--json"], env);
    expect(sub.code, sub.stderr).toBe(0);
    const s = JSON.parse(sub.stdout) as { array_job: string; merge_job: string; work: string };
    expect(s.array_job).toMatch(/^\d+$/);
    expect(s.merge_job).toMatch(/^\d+$/);
    expect(readFileSync(path.join(s.work, "shards.sbatch"), "utf8")).toContain("#SBATCH --array=0-3");
    expect(readFileSync(path.join(s.work, "merge.sbatch"), "utf8")).toContain(" merge ");
    const single = cliAsync(["run", file, "--out", path.join(dir, "single"), "--quiet", "--no-report"]);
    const st = await waitFor(out, env, 240);
    expect((await single).code).toBe(0);
    expect(st.state, JSON.stringify(st)).toBe("done");
    expect(st.shards.map((x: { state: string }) => x.state)).toEqual(["done", "done", "done", "done"]);
    expect(st.squeue).toBe(true);
    const m = JSON.parse(readFileSync(path.join(out, "manifest.json"), "utf8"));
    expect(m.merged.shards.map((x: { dir: string }) => x.dir)).toEqual([0, 1, 2, 3].map((k) => path.join(s.work, `shard-${k}`)));
    // Every data file (Parquet, Arrow, CSV) the same bytes.
    const single2 = path.join(dir, "single");
    expect(differingFiles(single2, out)).toEqual([]);
  }, 300_000);

  it("a failed shard cancels the merge job; status (exit 9) and a merge by hand name it", async () => {
    const out = path.join(dir, "failing");
    const faults = { ...env, CAIRN_FAULT: "after-step:stocks:fail", CAIRN_FAULT_SHARD: "2" };
    const sub = await cliAsync(["submit", file, "--slurm", "--shards", "4", "--out", out, "--json"], faults);
    expect(sub.code, sub.stderr).toBe(0);
    const { work, merge_job } = JSON.parse(sub.stdout) as { work: string; merge_job: string };
    const st = await waitFor(out, env, 240);
    expect(st.shards[2].state).toBe("failed");
    expect(st.shards[2].detail).toContain("injected failure at after-step:stocks in shard 2");
    expect(st.merge.state).toBe("cancelled");
    expect(st.merge.detail).toContain(`job ${merge_job} CANCELLED (DependencyNeverSatisfied)`);
    expect(existsSync(out)).toBe(false);
    const text = await cliAsync(["status", out], env);
    expect(text.code).toBe(9);
    expect(text.stdout).toContain("shard 2 failed; the merge does not run");
    const byHand = await cliAsync(["merge", ...[0, 1, 2, 3].map((k) => path.join(work, `shard-${k}`)), "--out", out, "--quiet"], env);
    expect(byHand.code).toBe(9);
    expect(byHand.stderr).toContain("shard 2");
    expect(byHand.stderr).toContain("injected failure");
  }, 300_000);
});
