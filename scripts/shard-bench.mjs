#!/usr/bin/env node
/**
 * Sharded runs measured on the local Slurm cluster (scripts/slurm-local.sh): the synthetic set
 * (README "Synthetic data") with a cohort model and a 150-year stock-driven scenario over it,
 * run on one machine and submitted with `cairn submit --slurm` in 1, 2 and 4 shards. Prints,
 * per run, the wall time from submission to the merged run, each shard's time, the merge's time
 * and its share of the wall time, and whether the merged tables are the single run's bytes.
 *
 *   node scripts/shard-bench.mjs [--size S|M] [--shards 1,2,4] [--cpus 1] [--merge-cpus N] [--mc DRAWS] [--json]
 *
 * --mc DRAWS: the history model also declares Monte Carlo uncertainty (DRAWS draws, lifetime
 * means ±15 %, input ±5 %, totals over everything and per region). A cohort model with Monte
 * Carlo runs at the merge (its per-draw totals cross shards), so this shows what sharding does
 * not yet split.
 *
 * --cpus: CPUs per shard job (default 1); --merge-cpus: for the merge job (default all of the node's).
 *
 * S is 10^6 trade rows, M 10^7 (the default). The data are generated once into .bench-cache/
 * (shared with npm run bench); the pipeline and the runs go to .bench-cache/shard-bench/. The
 * cluster is started (and stopped at the end) unless SLURM_CONF already points at one. Needs
 * root, Slurm and MUNGE (see scripts/slurm-local.md). Not part of npm test.
 */
import { execFileSync, spawnSync } from "node:child_process";
import { createHash } from "node:crypto";
import { existsSync, mkdirSync, readFileSync, readdirSync, rmSync, writeFileSync } from "node:fs";
import path from "node:path";
import { fileURLToPath } from "node:url";

const ROOT = path.resolve(path.dirname(fileURLToPath(import.meta.url)), "..");
const CLI = path.join(ROOT, "dist", "cli", "main.js");
const arg = (name, def) => {
  const i = process.argv.indexOf(`--${name}`);
  return i > 0 ? process.argv[i + 1] : def;
};
const size = arg("size", "M");
const rows = { S: 1_000_000, M: 10_000_000 }[size];
if (!rows) throw new Error(`--size ${size}: expected S or M`);
const shardCounts = arg("shards", "1,2,4").split(",").map(Number);
const cpus = Number(arg("cpus", "1"));
const nprocAll = Number(execFileSync("nproc", { encoding: "utf8" }).trim());
const mergeCpus = Number(arg("merge-cpus", String(nprocAll)));
const json = process.argv.includes("--json");
const mcDraws = Number(arg("mc", "0"));
const log = (m) => process.stderr.write(`shard-bench: ${m}\n`);
// Timings mean little on a busy machine: the load average is printed with them.
const loadBefore = readFileSync("/proc/loadavg", "utf8").split(" ").slice(0, 3).join(" ");

// The synthetic set, generated once (the same folder npm run bench uses).
const data = path.join(ROOT, ".bench-cache", `seed1-rows${rows}`);
if (!existsSync(path.join(data, "synth.json"))) {
  log(`generating ${rows} trade rows into ${data}`);
  execFileSync(process.execPath, [path.join(ROOT, "dist", "data", "synth.js"), "--trade-rows", String(rows), "--out", data], { stdio: ["ignore", "ignore", "inherit"] });
}
const synth = JSON.parse(readFileSync(path.join(data, "synth.json"), "utf8"));
const last = synth.firstYear + synth.years - 1;

const work = path.join(ROOT, ".bench-cache", "shard-bench", mcDraws > 0 ? `${size}-mc${mcDraws}` : size);
rmSync(work, { recursive: true, force: true });
mkdirSync(work, { recursive: true });
// Lifetimes by product (the synthetic concordance has products P0 … P39): Weibull, means 10–49 years.
writeFileSync(path.join(work, "lifetimes.csv"), "product,distribution,mean,sd\n" + Array.from({ length: 40 }, (_, i) => `P${i},weibull,${10 + i},${((10 + i) * 0.3).toFixed(1)}`).join("\n") + "\n");
const file = path.join(work, "pipeline.yaml");
writeFileSync(file, `name: shard_bench
base_unit: t
sources:
  production:
    path: ${path.join(data, "production.parquet")}
    unit: t
    columns: { region: { type: text, key: true }, commodity: { type: text, key: true }, year: { type: integer, key: true }, quantity: quantity }
  trade:
    path: ${path.join(data, "trade.parquet")}
    unit: t
    columns: { reporter: { type: text, key: true }, partner: { type: text, key: true }, commodity: { type: text, key: true }, flow: { type: text, key: true }, year: { type: integer, key: true }, quantity: quantity }
  concordance:
    path: ${path.join(data, "concordance.parquet")}
    columns: { commodity: text, product: text, material: text, factor: number, share: number }
  lifetimes:
    path: lifetimes.csv
    columns: { product: { type: text, nullable: true }, distribution: text, mean: { type: number, nullable: true }, sd: { type: number, nullable: true } }
steps:
  - id: consumption
    kind: apparent-consumption
    production: production
    trade: trade
    concordance: concordance
    keys: [region, product, material]
  - id: inflow
    kind: sql
    inputs: [consumption]
    query: SELECT region, product, year, sum(consumption ORDER BY material) AS value, any_value(unit) AS unit FROM consumption GROUP BY region, product, year
    columns: [region, product, year, value, unit]
    keys: [region, product, year]
  - id: stocks
    kind: cohort-model
    mode: inflow-driven
    input: inflow
    keys: [region, product]
    lifetimes: lifetimes
    negative_inflow: clamp
${mcDraws > 0 ? `    uncertainty:
      draws: ${mcDraws}
      seed: 7
      lifetimes: { mean: { family: normal, rel_sd: 0.15, truncate_below: 0 } }
      input: { spread: { family: normal, rel_sd: 0.05 } }
      totals: [[], [region]]
` : ""}  - id: stock_path
    kind: sql
    inputs: [stocks]
    query: >
      SELECT s.region, s.product, CAST(r.y AS BIGINT) AS year, s.stock * pow(1.01, r.y - s.year) AS stock, s.unit
      FROM stocks s CROSS JOIN range(${last + 1}, ${last + 151}) r(y) WHERE s.year = ${last}
    columns: [region, product, year, stock, unit]
    keys: [region, product, year]
  - id: scenario
    kind: cohort-model
    mode: stock-driven
    input: stock_path
    value: stock
    keys: [region, product]
    lifetimes: lifetimes
    continues: { step: stocks, year: ${last} }
    negative_inflow: clamp
`);

const cli = (args, env = {}) => spawnSync(process.execPath, [CLI, ...args], { cwd: ROOT, encoding: "utf8", env: { ...process.env, ...env } });
const secs = (a, b) => (Date.parse(b) - Date.parse(a)) / 1000;
const manifest = (dir) => JSON.parse(readFileSync(path.join(dir, "manifest.json"), "utf8"));
const hashes = (dir) => Object.fromEntries(readdirSync(dir).filter((f) => f.endsWith(".parquet")).map((f) => [f, createHash("sha256").update(readFileSync(path.join(dir, f))).digest("hex")]));

// The cluster.
let started = false;
if (!process.env.SLURM_CONF) {
  const up = spawnSync("bash", [path.join(ROOT, "scripts", "slurm-local.sh"), "up"], { encoding: "utf8" });
  const conf = /export SLURM_CONF=(\S+)/.exec(up.stdout)?.[1];
  if (up.status !== 0 || !conf) throw new Error(`scripts/slurm-local.sh up failed: ${up.stderr}`);
  process.env.SLURM_CONF = conf;
  started = true;
}
const nproc = nprocAll;

try {
  const results = [];
  // On one machine: a plain run, all cores.
  log("single run");
  const t0 = Date.now();
  const single = path.join(work, "single");
  const r = cli(["run", file, "--out", single, "--quiet", "--no-report", "--json"]);
  if (r.status !== 0) throw new Error(`single run failed: ${r.stderr}`);
  const singleWall = (Date.now() - t0) / 1000;
  const sm = manifest(single);
  const reference = hashes(single);
  const series = Number(sm.outputs.find((o) => o.table === "stocks")?.rows ?? 0) / synth.years;
  results.push({ run: "single (no cluster)", shards: 0, wall_s: singleWall, shard_s: null, merge_s: null, merge_share: null, identical: true });

  for (const n of shardCounts) {
    const out = path.join(work, `merged-${n}`);
    log(`submitting ${n} shard(s)`);
    const t1 = Date.now();
    const sub = cli(["submit", file, "--slurm", "--shards", String(n), "--cpus", String(cpus), "--merge-cpus", String(mergeCpus), "--out", out, "--json"]);
    if (sub.status !== 0) throw new Error(`submit failed: ${sub.stderr}`);
    const { merge_job } = JSON.parse(sub.stdout);
    // Waiting costs nothing measurable: the merged run's manifest is looked for, and squeue asked, once a second.
    for (;;) {
      if (existsSync(path.join(out, "manifest.json")) || existsSync(out + ".failed")) break;
      const q = spawnSync("squeue", ["-h", "-t", "all", "-j", merge_job, "-o", "%T"], { encoding: "utf8" }).stdout.trim();
      if (q === "CANCELLED" || q === "FAILED") break;
      spawnSync("sleep", ["1"]);
    }
    const wall = (Date.now() - t1) / 1000;
    const st = JSON.parse(cli(["status", out, "--json"]).stdout);
    if (st.state !== "done") throw new Error(`${n} shards: ${st.state}: ${JSON.stringify(st)}`);
    const shardTimes = st.shards.map((s) => { const m = manifest(s.dir); return secs(m.started_at, m.finished_at); });
    const mm = manifest(out);
    const mergeS = secs(mm.started_at, mm.finished_at);
    const h = hashes(out);
    const identical = Object.keys(reference).every((f) => reference[f] === h[f]) && Object.keys(h).length === Object.keys(reference).length;
    results.push({
      run: `${n} shard${n > 1 ? "s" : ""} on Slurm`, shards: n, wall_s: wall, shard_s: shardTimes, merge_s: mergeS, merge_share: mergeS / wall, identical,
      timings: { shard_steps: manifest(st.shards[0].dir).timings_s, merge: mm.timings_s },
    });
  }
  const info = { load_average_before: loadBefore, size, trade_rows: synth.tradeRows, production_rows: synth.productionRows, regions: synth.regions, series, years: synth.years, scenario_years: 150, mc_draws: mcDraws, cpus_per_shard: cpus, cpus_merge: mergeCpus, node_cpus: nproc };
  if (json) process.stdout.write(JSON.stringify({ ...info, results }) + "\n");
  else {
    process.stdout.write(`sharded runs, ${size}: ${synth.tradeRows} trade rows, ${synth.productionRows} production rows, ${synth.regions} regions, ${series} series × ${synth.years} years + 150 scenario years${mcDraws > 0 ? `, Monte Carlo ${mcDraws} draws on the history model` : ""}; ${cpus} CPU per shard, ${mergeCpus} for the merge, on a ${nproc}-CPU node (load average before: ${loadBefore})\n`);
    process.stdout.write(`${"run".padEnd(22)} ${"wall s".padStart(7)} ${"shards s (each)".padEnd(28)} ${"merge s".padStart(8)} ${"merge share".padStart(12)}  same bytes\n`);
    for (const x of results) {
      process.stdout.write(`${x.run.padEnd(22)} ${x.wall_s.toFixed(1).padStart(7)} ${(x.shard_s ? x.shard_s.map((v) => v.toFixed(1)).join(", ") : "-").padEnd(28)} ${(x.merge_s === null ? "-" : x.merge_s.toFixed(1)).padStart(8)} ${(x.merge_share === null ? "-" : `${(100 * x.merge_share).toFixed(0)} %`).padStart(12)}  ${x.identical ? "yes" : "NO"}\n`);
    }
  }
} finally {
  if (started) spawnSync("bash", [path.join(ROOT, "scripts", "slurm-local.sh"), "down"], { stdio: "ignore" });
}
