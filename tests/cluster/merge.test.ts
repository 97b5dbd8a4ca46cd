/**
 * Sharded runs without a cluster: `cairn run --shard K/N` for every shard, then `cairn merge`.
 * The merged run directory must hold the same bytes as a run of the same pipeline on one machine
 * in every published file (each table's Parquet, the audit table, rejects, the Arrow copy, the
 * SDMX-CSV exports): the contract, and what makes a sharded release a release.
 * Refusals: a wrong set of shard directories (exit 2), a failed or altered shard (exit 9), inputs
 * changed between the shards and the merge (exit 8).
 */
import { beforeAll, describe, expect, it } from "vitest";
import { cpSync, existsSync, readFileSync, writeFileSync, appendFileSync } from "node:fs";
import path from "node:path";
import { tmp } from "../helpers.js";
import { cliAsync, DEMO, DEMO_DATA, demoWithoutMonteCarlo, differingFiles, dataFiles, runShards } from "./helpers.js";

const manifest = (dir: string) => JSON.parse(readFileSync(path.join(dir, "manifest.json"), "utf8")) as Record<string, any>;

describe("the demo as shipped, in 2 shards", () => {
  const dir = tmp("cairn-shards-");
  const single = path.join(dir, "single");
  const shards = path.join(dir, "s2");
  const merged = path.join(dir, "merged");

  beforeAll(async () => {
    const [one, ...parts] = await Promise.all([
      cliAsync(["run", DEMO, "--out", single, "--quiet", "--no-report"]),
      ...[0, 1].map((k) => cliAsync(["run", DEMO, "--shard", `${k}/2`, "--out", path.join(shards, `shard-${k}`), "--quiet"])),
    ]);
    expect(one!.code, one!.stderr).toBe(0);
    for (const p of parts) expect(p.code, p.stderr).toBe(0);
    const m = await cliAsync(["merge", path.join(shards, "shard-0"), path.join(shards, "shard-1"), "--out", merged, "--quiet", "--no-report"]);
    expect(m.code, m.stderr).toBe(0);
  }, 240_000);

  it("publishes the same bytes as a single run, in every file", () => {
    expect(dataFiles(single).length).toBeGreaterThan(15);
    expect(dataFiles(single)).toContain("audit.parquet");
    expect(differingFiles(single, merged)).toEqual([]);
  });

  it("names its shards and where each step ran in its manifest", () => {
    const m = manifest(merged);
    expect(m.status).toBe("ok");
    expect(m.merged.by).toBe("region");
    expect(m.merged.shards.map((x: { dir: string }) => x.dir)).toEqual([path.join(shards, "shard-0"), path.join(shards, "shard-1")]);
    expect(m.merged.shards.map((x: { keys: number }) => x.keys)).toEqual([2, 3]); // five invented regions: blocks of 2 and 3
    expect(m.steps.find((s: { id: string }) => s.id === "consumption").placement).toBe("both");
    expect(m.steps.find((s: { id: string }) => s.id === "consumption_by_group").placement).toBe("merge");
    // Each shard lists its block of the sorted regions.
    const s0 = manifest(path.join(shards, "shard-0")).shard;
    const s1 = manifest(path.join(shards, "shard-1")).shard;
    expect(s0.all_keys).toEqual(["ALD", "BRV", "COR", "DUN", "EST"]);
    expect([...s0.keys, ...s1.keys]).toEqual(s0.all_keys);
    expect(s0.plan_fingerprint).toBe(s1.plan_fingerprint);
  });

  it("refuses a wrong set of shard directories (exit 2)", async () => {
    const missing = await cliAsync(["merge", path.join(shards, "shard-0"), "--out", path.join(dir, "x1"), "--quiet"]);
    expect(missing.code).toBe(2);
    expect(missing.stderr).toContain("shard 1 of 2 missing");
    const twice = await cliAsync(["merge", path.join(shards, "shard-0"), path.join(shards, "shard-0"), path.join(shards, "shard-1"), "--out", path.join(dir, "x2"), "--quiet"]);
    expect(twice.code).toBe(2);
    expect(twice.stderr).toContain("shard 0 is given twice");
    const notShard = await cliAsync(["merge", single, "--out", path.join(dir, "x3"), "--quiet"]);
    expect(notShard.code).toBe(2);
    expect(notShard.stderr).toContain("not a shard run directory");
    expect(existsSync(path.join(dir, "x1")) || existsSync(path.join(dir, "x2")) || existsSync(path.join(dir, "x3"))).toBe(false);
  });

  it("refuses a failed shard, naming it (exit 9), and an altered shard file (exit 9)", async () => {
    const bad = path.join(dir, "bad");
    const r = await cliAsync(["run", DEMO, "--shard", "1/2", "--out", path.join(bad, "shard-1"), "--quiet"], { CAIRN_FAULT: "after-step:material_totals:fail", CAIRN_FAULT_SHARD: "1" });
    expect(r.code).toBe(3);
    expect(existsSync(path.join(bad, "shard-1.failed", "manifest.json"))).toBe(true);
    const m = await cliAsync(["merge", path.join(shards, "shard-0"), path.join(bad, "shard-1"), "--out", path.join(dir, "x4"), "--quiet"]);
    expect(m.code).toBe(9);
    expect(m.stderr).toContain("shard 1");
    expect(m.stderr).toContain("injected failure at after-step:material_totals");
    expect(m.stderr).toContain(`${path.join(bad, "shard-1")}.failed/run.log`);
    // A shard whose published table was changed after it ran.
    const altered = path.join(dir, "altered");
    cpSync(path.join(shards, "shard-1"), path.join(altered, "shard-1"), { recursive: true });
    appendFileSync(path.join(altered, "shard-1", "material_totals.parquet"), "x");
    const a = await cliAsync(["merge", path.join(shards, "shard-0"), path.join(altered, "shard-1"), "--out", path.join(dir, "x5"), "--quiet"]);
    expect(a.code).toBe(9);
    expect(a.stderr).toContain("does not match the SHA-256");
  }, 120_000);

  it("refuses bad shard options (exit 2)", async () => {
    const k = await cliAsync(["run", DEMO, "--shard", "2/2", "--out", path.join(dir, "x6"), "--quiet"]);
    expect(k.code).toBe(2);
    expect(k.stderr).toContain("expected K/N with 0 ≤ K < N");
    const by = await cliAsync(["run", DEMO, "--shard", "0/2", "--shard-by", "material", "--out", path.join(dir, "x7"), "--quiet"]);
    expect(by.code).toBe(2);
    expect(by.stderr).toContain("no step of this pipeline can run in shards by material");
  });
});

describe("the demo without Monte Carlo: cohort models in the shards", () => {
  const dir = tmp("cairn-shards-nomc-");
  const file = demoWithoutMonteCarlo(dir);
  const single = path.join(dir, "single");

  beforeAll(async () => {
    const r = await cliAsync(["run", file, "--out", single, "--quiet", "--no-report"]);
    expect(r.code, r.stderr).toBe(0);
  }, 120_000);

  for (const n of [4, 6]) {
    it(`${n} shards${n === 6 ? " (one more than there are regions: a shard with none)" : ""}: the same bytes as a single run`, async () => {
      const shards = path.join(dir, `s${n}`);
      for (const r of await runShards(file, n, shards)) expect(r.code, r.stderr).toBe(0);
      const merged = path.join(dir, `merged${n}`);
      const m = await cliAsync(["merge", ...[...Array(n).keys()].map((k) => path.join(shards, `shard-${k}`)), "--out", merged, "--quiet", "--no-report"]);
      expect(m.code, m.stderr).toBe(0);
      expect(differingFiles(single, merged)).toEqual([]);
      const placement = Object.fromEntries(manifest(merged).steps.map((s: { id: string; placement: string }) => [s.id, s.placement]));
      expect(placement).toMatchObject({ consumption: "both", consumption_by_group: "merge", product_inflow: "shards", stocks: "shards", stock_path: "shards", scenario: "shards" });
      const keys = [...Array(n).keys()].map((k) => manifest(path.join(shards, `shard-${k}`)).shard.keys.length);
      expect(keys.reduce((a, b) => a + b, 0)).toBe(5);
      if (n === 6) expect(keys).toContain(0);
    }, 240_000);
  }

  it("a cohort-resolved table in many parts: the merge cuts the same parts as a single run, byte for byte", async () => {
    // Parts of at most 2,500 rows (the writer's and the merge's cut, src/ops/by-cohort-writer.ts):
    // the demo's lifetime groups span regions, so a single run's series come in key order only
    // because the writer takes them so; cuts fall between and inside series.
    const env = { CAIRN_BY_COHORT_PART_ROWS: "2500" };
    const one = path.join(dir, "single-parts");
    const r = await cliAsync(["run", file, "--out", one, "--quiet", "--no-report"], env);
    expect(r.code, r.stderr).toBe(0);
    const parts = dataFiles(one).filter((f) => f.startsWith("stocks_by_cohort/"));
    expect(parts.length).toBeGreaterThan(3);
    const shards = path.join(dir, "s3-parts");
    for (const x of await runShards(file, 3, shards, [], env)) expect(x.code, x.stderr).toBe(0);
    const merged = path.join(dir, "merged-parts");
    const m = await cliAsync(["merge", ...[0, 1, 2].map((k) => path.join(shards, `shard-${k}`)), "--out", merged, "--quiet", "--no-report"], env);
    expect(m.code, m.stderr).toBe(0);
    expect(differingFiles(one, merged)).toEqual([]);
  }, 240_000);

  it("refuses to merge when an input changed after the shards ran (exit 8)", async () => {
    const data = path.join(dir, "data");
    cpSync(DEMO_DATA, data, { recursive: true });
    const shards = path.join(dir, "changed");
    for (const r of await runShards(file, 2, shards, ["--set", `data=${data}`])) expect(r.code, r.stderr).toBe(0);
    // One population figure revised after the shards read it.
    const f = path.join(data, "population.csv");
    const lines = readFileSync(f, "utf8").split("\n");
    lines[1] = lines[1]!.replace(/[\d.]+$/, (x) => String(Number(x) + 1));
    writeFileSync(f, lines.join("\n"));
    const m = await cliAsync(["merge", path.join(shards, "shard-0"), path.join(shards, "shard-1"), "--out", path.join(dir, "x"), "--quiet"]);
    expect(m.code).toBe(8);
    expect(m.stderr).toContain("the files of source population changed");
  }, 120_000);
});
