/**
 * cairn submit without a cluster: the batch scripts (--dry-run) and the refusal of bad options
 * before anything is written or submitted. The jobs themselves run in slurm.test.ts.
 */
import { describe, expect, it } from "vitest";
import { existsSync } from "node:fs";
import path from "node:path";
import { tmp } from "../helpers.js";
import { cliAsync, DEMO } from "./helpers.js";

describe("cairn submit --dry-run", () => {
  const dir = tmp("cairn-submit-");
  const out = path.join(dir, "merged");

  it("prints a job array of the shards and a merge job that waits for all of them", async () => {
    const r = await cliAsync(["submit", DEMO, "--slurm", "--shards", "3", "--out", out, "--partition", "short", "--time", "1:30:00", "--mem", "4g",
      "--cpus", "2", "--merge-cpus", "4", "--memory-limit", "3GB", "--setup", "module load nodejs/20", "--set", "data=../data-samples/demo", "--dry-run"]);
    expect(r.code, r.stderr).toBe(0);
    const [shards, merge] = r.stdout.split("# merge.sbatch");
    expect(r.stdout).toContain("--dependency=afterok:<array job id> --kill-on-invalid-dep=yes");
    expect(shards).toContain("#SBATCH --array=0-2");
    expect(shards).toContain("#SBATCH --partition=short");
    expect(shards).toContain("#SBATCH --time=1:30:00");
    expect(shards).toContain("#SBATCH --mem=4G");
    expect(shards).toContain("#SBATCH --cpus-per-task=2");
    expect(shards).toContain("module load nodejs/20");
    expect(shards).toContain(`--shard "\${SLURM_ARRAY_TASK_ID}/3" --shard-by region`);
    expect(shards).toContain(`--out ${out}.shards/shard-"\${SLURM_ARRAY_TASK_ID}"`);
    expect(shards).toContain("--set data=../data-samples/demo --memory-limit 3GB");
    expect(merge).toContain("#SBATCH --cpus-per-task=4");
    expect(merge).toContain(` merge ${out}.shards/shard-0 ${out}.shards/shard-1 ${out}.shards/shard-2`);
    expect(merge).toContain(`--out ${out} --memory-limit 3GB`);
    expect(existsSync(`${out}.shards`)).toBe(false);
  });

  it("refuses bad options before writing anything (exit 2)", async () => {
    const cases: [string[], string][] = [
      [["--shards", "0"], "expected a whole number of shards"],
      [["--shards", "2", "--time", "2h"], "expected a Slurm time limit"],
      [["--shards", "2", "--mem", "lots"], "expected a whole number with an optional unit"],
      [["--shards", "2", "--partition", "a b"], "expected a Slurm name"],
      [["--shards", "2", "--cpus", "0"], "expected a whole number of CPUs"],
      [["--shards", "2", "--shard-by", "material"], "no step of this pipeline can run in shards by material"],
    ];
    for (const [args, message] of cases) {
      const r = await cliAsync(["submit", DEMO, "--slurm", "--out", out, ...args]);
      expect(r.code, args.join(" ")).toBe(2);
      expect(r.stderr).toContain(message);
    }
    expect(existsSync(`${out}.shards`)).toBe(false);
  }, 60_000);
});
