import { defineConfig } from "vitest/config";

export default defineConfig({
  test: {
    include: ["tests/**/*.test.ts"],
    // A one-node Slurm cluster for tests/cluster (started once when those tests run, as root, with Slurm installed).
    globalSetup: ["tests/cluster/setup.ts"],
    testTimeout: 120_000,
    hookTimeout: 120_000,
    pool: "forks",
    maxWorkers: 2,
  },
});
