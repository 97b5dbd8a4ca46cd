/**
 * vitest global setup: a one-node Slurm cluster on localhost (scripts/slurm-local.sh) for the
 * cluster tests, started once before and stopped once after the whole run (a cluster that was
 * already up is used and left running). It starts only when
 * the run includes tests/cluster (every run without file filters does), as root, with Slurm's
 * sbatch installed; otherwise the Slurm tests are skipped with the reason.
 */
import { spawnSync } from "node:child_process";
import path from "node:path";
import { fileURLToPath } from "node:url";
import type { TestProject } from "vitest/node";

declare module "vitest" {
  export interface ProvidedContext {
    /** SLURM_CONF of the running test cluster, or null. */
    slurmConf: string | null;
    /** Why there is no cluster: a reason to skip, or an error (the cluster should have started). */
    slurmSkip: string | null;
    slurmError: string | null;
  }
}

const SCRIPT = path.resolve(path.dirname(fileURLToPath(import.meta.url)), "..", "..", "scripts", "slurm-local.sh");

function skipReason(): string | null {
  const filters = process.argv.slice(2).filter((a) => !a.startsWith("-") && a !== "run" && !/vitest(\.mjs)?$/.test(a));
  if (filters.length && !filters.some((f) => f.includes("cluster"))) return "no cluster test file in this run";
  if (process.platform !== "linux" || process.getuid?.() !== 0) return "the local Slurm cluster needs root (scripts/slurm-local.sh)";
  if (spawnSync("sh", ["-c", "command -v sbatch"]).status !== 0) return "sbatch is not installed (apt-get install slurm-wlm munge; .ci/run does it)";
  return null;
}

export default function setup(project: TestProject): (() => void) | undefined {
  project.provide("slurmConf", null);
  project.provide("slurmError", null);
  const skip = skipReason();
  project.provide("slurmSkip", skip);
  if (skip) return undefined;
  const up = spawnSync("bash", [SCRIPT, "up"], { encoding: "utf8", timeout: 180_000 });
  const conf = /^export SLURM_CONF=(\S+)$/m.exec(up.stdout ?? "")?.[1];
  if (up.status !== 0 || !conf) {
    project.provide("slurmError", `scripts/slurm-local.sh up failed (exit ${up.status}): ${(up.stderr ?? "").trim().split("\n").slice(-8).join("\n")}`);
    return undefined;
  }
  project.provide("slurmConf", conf);
  // A cluster someone else started (another test run, a developer) is theirs to stop.
  if (/already up/.test(up.stderr ?? "")) return undefined;
  return () => {
    spawnSync("bash", [SCRIPT, "down"], { encoding: "utf8", timeout: 120_000 });
  };
}
