/**
 * The refresh benchmark: a release of the synthetic set (table stage, then inflow per region and
 * material, and a cohort model), then two refreshes, each timed with re-use and in full:
 * (a) only the newest year's trade changed, (b) only a lifetime changed.
 */
import { existsSync, linkSync, mkdirSync, rmSync, writeFileSync } from "node:fs";
import path from "node:path";
import { synthPipeline } from "../data/synth.js";
import { loadPipeline } from "../spec/load.js";
import { runPipeline } from "../run/runner.js";
import { Session } from "../engine/session.js";
import { lit } from "../engine/sql.js";
import { Progress } from "../run/progress.js";
import { ensureSynthetic, SIZES, type Size, type StageResult } from "./stages.js";

const say = (m: string) => process.stderr.write(`  ${m}\n`);

function pipeline(dir: string): string {
  return synthPipeline(dir).replace("name: synthetic", "name: refresh\ncatalog: catalog").replace(/path: (\w+)\.parquet/g, "path: ${data}/$1.parquet")
    .replace("sources:", "variables: { data: base }\nsources:") + `  - id: inflow
    kind: sql
    inputs: [consumption]
    query: SELECT region, material, year, consumption AS value, unit FROM consumption
    columns: [region, material, year, value, unit]
  - id: stocks
    kind: cohort-model
    mode: inflow-driven
    input: inflow
    keys: [region, material]
    lifetimes: lifetimes
    negative_inflow: clamp
    indicators: false
`.replace(/^/gm, "") + "";
}

export async function refreshStage(cacheRoot: string, size: Size, memoryLimit?: string): Promise<StageResult> {
  const rows = SIZES[size];
  const synth = await ensureSynthetic(cacheRoot, rows);
  const root = path.join(cacheRoot, `refresh-${size}`);
  rmSync(root, { recursive: true, force: true });
  const link = (from: string, to: string) => { mkdirSync(path.dirname(to), { recursive: true }); linkSync(from, to); };
  for (const v of ["base", "trade", "life"]) for (const f of ["production.parquet", "trade.parquet", "concordance.parquet"]) {
    if (v === "trade" && f === "trade.parquet") continue;
    link(path.join(synth, f), path.join(root, v, f));
  }
  // (a) the newest year's trade revised by +1 %: the file is rewritten (as a statistics office would re-issue it).
  const s = await Session.open({ memoryLimit });
  await s.run(`COPY (SELECT reporter, partner, commodity, flow, year, CASE WHEN year = (SELECT max(year) FROM read_parquet(${lit(path.join(synth, "trade.parquet"))}))
      THEN quantity * 1.01 ELSE quantity END AS quantity FROM read_parquet(${lit(path.join(synth, "trade.parquet"))})) TO ${lit(path.join(root, "trade", "trade.parquet"))} (FORMAT parquet, COMPRESSION zstd)`);
  s.close();
  const lifetimes = (mean: number) => `material,distribution,mean,sd\n,normal,${mean},${mean * 0.3}\n`;
  for (const v of ["base", "trade"]) writeFileSync(path.join(root, v, "lifetimes.csv"), lifetimes(30));
  writeFileSync(path.join(root, "life", "lifetimes.csv"), lifetimes(32));
  const yaml = pipeline(root).replace("steps:", `  lifetimes:
    path: \${data}/lifetimes.csv
    columns: { material: { type: text, nullable: true }, distribution: text, mean: number, sd: number }
steps:`);
  writeFileSync(path.join(root, "p.yaml"), yaml);
  const run = async (data: string, id: string, reuse: boolean, against?: string) => {
    const t0 = performance.now();
    const r = await runPipeline(loadPipeline(path.join(root, "p.yaml"), { data }), {
      release: against ? undefined : id, out: against ? path.join(root, "runs", id) : undefined, against, reuse, replace: true, memoryLimit, progress: new Progress(true),
    });
    const t = (performance.now() - t0) / 1000;
    if (r.status !== "ok") throw new Error(`refresh run ${id} failed: ${r.error}`);
    say(`refresh ${id}: ${t.toFixed(2)} s, re-used ${r.reused.join(", ") || "nothing"}`);
    return { t, reused: r.reused };
  };
  const base = await run("base", "base", false);
  const base2 = path.join(root, "catalog", "base");
  // Each refresh in full (no re-use, compared with the base release) and with re-use.
  const tradeFull = await run("trade", "trade-full", false, base2);
  const tradeReuse = await run("trade", "trade-reuse", true, base2);
  const lifeFull = await run("life", "life-full", false, base2);
  const lifeReuse = await run("life", "life-reuse", true, base2);
  if (!existsSync(base2)) throw new Error("the base release is missing");
  return {
    stage: "refresh", refresh_rows: rows, refresh_base_s: base.t,
    refresh_trade_full_s: tradeFull.t, refresh_trade_reuse_s: tradeReuse.t, refresh_trade_reused: tradeReuse.reused.length,
    refresh_lifetime_full_s: lifeFull.t, refresh_lifetime_reuse_s: lifeReuse.t, refresh_lifetime_reused: lifeReuse.reused.length,
  };
}
