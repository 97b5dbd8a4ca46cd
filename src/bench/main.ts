/**
 * `npm run bench -- [--size S|M|L] [--json] [--runs N] [--scaling]`
 * Each stage runs in a child process (its own peak RSS); figures are printed per stage.
 */
import { spawnSync } from "node:child_process";
import path from "node:path";
import { fileURLToPath } from "node:url";
import { byCohortStage, cohortStage, handoffStage, SIZES, tableStage, type Size, type StageResult } from "./stages.js";
import { refreshStage } from "./refresh.js";
import { mcStage } from "./mc.js";
import { hostInfo, hostLine } from "./host.js";

const ROOT = path.resolve(path.dirname(fileURLToPath(import.meta.url)), "..", "..");
const CACHE = path.join(ROOT, ".bench-cache");

function arg(name: string): string | undefined {
  const i = process.argv.indexOf(`--${name}`);
  return i > 0 ? process.argv[i + 1] : undefined;
}
const flag = (name: string) => process.argv.includes(`--${name}`);

async function child(): Promise<void> {
  const stage = arg("stage")!;
  const runs = Number(arg("runs") ?? 3);
  const mem = arg("memory-limit");
  let r: StageResult;
  switch (stage) {
    case "table": r = await tableStage(CACHE, (arg("size") ?? "S") as Size, runs, mem); break;
    case "cohort": r = await cohortStage(Number(arg("series")), Number(arg("years")), Number(arg("groups") ?? 100), runs); break;
    case "handoff": r = await handoffStage(Number(arg("values") ?? 1e7), runs); break;
    case "by_cohort": r = await byCohortStage(CACHE, Number(arg("series")), Number(arg("years")), mem ?? "1GB"); break;
    case "refresh": r = await refreshStage(CACHE, (arg("size") ?? "M") as Size, mem); break;
    case "mc": r = await mcStage(Number(arg("draws")), Number(arg("series")), Number(arg("years")), Number(arg("groups") ?? 100)); break;
    default: throw new Error(`unknown stage ${stage}`);
  }
  r.peak_rss_bytes = process.resourceUsage().maxRSS * 1024;
  process.stdout.write(JSON.stringify(r) + "\n");
}

function runStage(args: string[]): StageResult {
  process.stderr.write(`stage ${args[1]} ${args.slice(2).join(" ")}\n`);
  const r = spawnSync(process.execPath, [fileURLToPath(import.meta.url), "--child", "--stage", ...args], { encoding: "utf8", stdio: ["ignore", "pipe", "inherit"], maxBuffer: 1 << 26 });
  if (r.status !== 0) throw new Error(`stage ${args.join(" ")} failed (exit ${r.status})`);
  return JSON.parse(r.stdout.trim().split("\n").pop()!) as StageResult;
}

const fmt = (x: number) => (x >= 1e4 || x < 1e-2 ? x.toExponential(2) : x.toFixed(2));
const gb = (b: number) => `${(b / 2 ** 30).toFixed(2)} GiB`;

async function main(): Promise<void> {
  const size = (arg("size") ?? "S") as Size;
  if (!(size in SIZES)) throw new Error(`--size takes S, M or L (got ${size})`);
  const runs = arg("runs") ?? "3";
  const json = flag("json");
  const mem = arg("memory-limit") ?? "4GB";
  const series = Number(arg("series") ?? 100000);
  const years = Number(arg("years") ?? 200);
  const results: StageResult[] = [];
  results.push(runStage(["table", "--size", size, "--runs", runs, "--memory-limit", mem]));
  results.push(runStage(["cohort", "--series", String(series), "--years", String(years), "--groups", "100", "--runs", runs]));
  results.push(runStage(["handoff", "--values", "10000000", "--runs", runs]));
  results.push(runStage(["by_cohort", "--series", "10000", "--years", "200", "--memory-limit", "1GB"]));
  // Monte Carlo: 1,000 draws of 10,000 series × 200 years, 100 lifetime groups (--mc-draws, --mc-series to change; --no-mc to skip).
  if (!flag("no-mc")) results.push(runStage(["mc", "--draws", arg("mc-draws") ?? "1000", "--series", arg("mc-series") ?? "10000", "--years", "200", "--groups", "100"]));
  // The refresh stage (re-use of unchanged work): opt-in with --refresh (M by default, or --refresh-size).
  if (flag("refresh")) results.push(runStage(["refresh", "--size", arg("refresh-size") ?? "M", "--memory-limit", mem]));
  const scaling: Record<string, number>[] = [];
  if (flag("scaling")) {
    for (const s of ["S", "M", "L"] as Size[]) {
      if (s === "L" && size !== "L") continue;
      const t = runStage(["table", "--size", s, "--runs", "1", "--memory-limit", mem]);
      scaling.push({ table_rows: Number(t.table_rows), seconds: Number(t.table_stage_s), hand_written_s: Number(t.table_raw_duckdb_s), peak_rss_bytes: Number(t.table_stage_peak_rss_bytes) });
    }
    for (const y of [50, 100, 200, 400, 800]) {
      const c = runStage(["cohort", "--series", "10000", "--years", String(y), "--groups", "100", "--runs", "1"]);
      scaling.push({ cohort_years: y, inflow_driven_s: Number(c.inflow_driven_s), cells_per_s: Number(c.inflow_driven_cells_per_s) });
    }
  }
  const get = (stage: string) => results.find((r) => r.stage === stage)!;
  const t = get("table"), c = get("cohort"), h = get("handoff"), b = get("by_cohort");
  const host = await hostInfo();
  const lines = [
    hostLine(host),
    `stage        size                                  median      throughput                 peak RSS`,
    `table        ${t.table_rows} trade + ${t.production_rows} production rows   ${fmt(Number(t.table_stage_s))} s   ${fmt(Number(t.table_rows_per_s))} rows/s; hand-written SQL ${fmt(Number(t.table_raw_duckdb_s))} s (ratio ${Number(t.table_stage_ratio).toFixed(2)})   ${gb(Number(t.table_stage_peak_rss_bytes))} (with the hand-written SQL ${gb(Number(t.peak_rss_bytes))})`,
    `inflow       ${c.cohort_series} series × ${c.cohort_years} years            ${fmt(Number(c.inflow_driven_s))} s   ${fmt(Number(c.inflow_driven_cells_per_s))} cells/s   ${gb(Number(c.peak_rss_bytes))} (${c.cohort_kernels})${c.numpy_inflow_driven_cells_per_s !== undefined ? `; numpy + OpenBLAS ${fmt(Number(c.numpy_inflow_driven_cells_per_s))} cells/s (cairn ${Number(c.inflow_speed_ratio_to_numpy).toFixed(2)}×; its product alone ${fmt(Number(c.numpy_product_cells_per_s))})` : ""}`,
    `stock        ${c.cohort_series} series × ${c.cohort_years} years            ${fmt(Number(c.stock_driven_s))} s   ${fmt(Number(c.stock_driven_cells_per_s))} cells/s (round trip max rel. error ${fmt(Number(c.round_trip_max_rel_error))})`,
    `composition  ${c.cohort_series} series × ${c.cohort_years} years × 3   ${fmt(Number(c.composition_s))} s   ${fmt(Number(c.composition_cells_per_s))} cells/s`,
    `hand-off     ${h.handoff_values} values                      read ${fmt(Number(h.handoff_read_values_per_s))} values/s, write ${fmt(Number(h.handoff_write_rows_per_s))} rows/s (${h.handoff_native})   ${gb(Number(h.peak_rss_bytes))}`,
    `by-cohort    ${b.by_cohort_series} series × ${b.by_cohort_years} years → ${b.by_cohort_rows} rows   ${fmt(Number(b.by_cohort_s))} s   ${fmt(Number(b.by_cohort_rows_per_s))} rows/s   ${gb(Number(b.peak_rss_bytes))}`,
  ];
  const mc = results.find((r) => r.stage === "mc");
  if (mc) lines.push(`monte carlo  ${mc.mc_draws} draws × ${mc.mc_series} series × ${mc.mc_years} years   ${fmt(Number(mc.mc_s))} s   ${fmt(Number(mc.mc_cells_per_s))} cells/s (${mc.mc_threads} threads)   ${gb(Number(mc.peak_rss_bytes))}${mc.numpy_mc_s !== undefined ? `; numpy + OpenBLAS ${fmt(Number(mc.numpy_mc_s))} s (cairn ${Number(mc.mc_speed_ratio_to_numpy).toFixed(2)}× as fast)` : ""}`);
  const rf = results.find((r) => r.stage === "refresh");
  if (rf) {
    lines.push(`refresh      ${rf.refresh_rows} trade rows: newest year's trade changed ${fmt(Number(rf.refresh_trade_reuse_s))} s with re-use (${rf.refresh_trade_reused} steps re-used) vs ${fmt(Number(rf.refresh_trade_full_s))} s in full; a lifetime changed ${fmt(Number(rf.refresh_lifetime_reuse_s))} s with re-use (${rf.refresh_lifetime_reused} steps) vs ${fmt(Number(rf.refresh_lifetime_full_s))} s`);
  }
  if (scaling.length) {
    lines.push("scaling:");
    for (const s of scaling) lines.push("  " + JSON.stringify(s));
  }
  process.stderr.write(lines.join("\n") + "\n");
  const summary = {
    host,
    table_rows: t.table_rows, table_stage_s: t.table_stage_s, table_raw_duckdb_s: t.table_raw_duckdb_s, table_stage_ratio: t.table_stage_ratio,
    cohort_series: c.cohort_series, cohort_years: c.cohort_years,
    inflow_driven_cells_per_s: c.inflow_driven_cells_per_s, stock_driven_cells_per_s: c.stock_driven_cells_per_s, composition_cells_per_s: c.composition_cells_per_s,
    handoff_read_values_per_s: h.handoff_read_values_per_s, handoff_write_rows_per_s: h.handoff_write_rows_per_s,
    ...(c.numpy_inflow_driven_cells_per_s !== undefined ? { numpy_inflow_driven_cells_per_s: c.numpy_inflow_driven_cells_per_s, numpy_product_cells_per_s: c.numpy_product_cells_per_s, inflow_speed_ratio_to_numpy: c.inflow_speed_ratio_to_numpy } : {}),
    cohort_kernels: c.cohort_kernels, handoff_path: h.handoff_native,
    by_cohort_rows: b.by_cohort_rows, by_cohort_peak_rss_bytes: b.peak_rss_bytes,
    peak_rss_bytes: Math.max(...results.map((r) => Number(r.peak_rss_bytes))),
    table_peak_rss_bytes: t.peak_rss_bytes, table_stage_peak_rss_bytes: t.table_stage_peak_rss_bytes, audit_errors: t.audit_errors,
    ...(mc ? { mc_draws: mc.mc_draws, mc_series: mc.mc_series, mc_years: mc.mc_years, mc_s: mc.mc_s, mc_cells_per_s: mc.mc_cells_per_s, mc_peak_rss_bytes: mc.peak_rss_bytes,
      ...(mc.numpy_mc_s !== undefined ? { numpy_mc_s: mc.numpy_mc_s, mc_speed_ratio_to_numpy: mc.mc_speed_ratio_to_numpy } : {}) } : {}),
    ...(rf ? { refresh_trade_reuse_s: rf.refresh_trade_reuse_s, refresh_trade_full_s: rf.refresh_trade_full_s, refresh_lifetime_reuse_s: rf.refresh_lifetime_reuse_s, refresh_lifetime_full_s: rf.refresh_lifetime_full_s } : {}),
    stages: results, scaling,
  };
  if (json) process.stdout.write(JSON.stringify(summary) + "\n");
  else process.stdout.write(lines.join("\n") + "\n");
}

(flag("child") ? child() : main()).catch((e: unknown) => {
  process.stderr.write(`bench: ${(e as Error).stack ?? e}\n`);
  process.exit(1);
});
