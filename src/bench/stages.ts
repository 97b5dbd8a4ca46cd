/** Benchmark stages. Each runs in its own process so that its peak RSS is its own. */
import { existsSync, mkdirSync, readFileSync, rmSync, writeFileSync } from "node:fs";
import path from "node:path";
import { spawnSync } from "node:child_process";
import { fileURLToPath } from "node:url";
import { generateSynthetic, synthPipeline } from "../data/synth.js";
import { loadPipeline } from "../spec/load.js";
import { runPipeline } from "../run/runner.js";
import { Session } from "../engine/session.js";
import { lit } from "../engine/sql.js";
import { nativeReader, ReadBuffers, readColumns, writeColumns } from "../engine/handoff.js";
import { kernelDescription } from "../cohort/kernels.js";
import { CohortGroup, curveOf, makeLifetime, type ModelResult } from "../cohort/index.js";
import { CohortPool, recycle, runTasks, taskFor } from "../cohort/pool.js";
import { KernelArena } from "../cohort/arena.js";
import { mulberry32 } from "../data/prng.js";
import { Progress } from "../run/progress.js";

export const SIZES = { S: 1e6, M: 1e7, L: 1e8 } as const;
export type Size = keyof typeof SIZES;

export interface StageResult {
  stage: string;
  [k: string]: number | string | number[] | Record<string, number>[];
}

function median(xs: number[]): number {
  const s = [...xs].sort((a, b) => a - b);
  return s[Math.floor(s.length / 2)]!;
}

/** Runs f `warmup` times untimed (compilation, first touch of memory), then `runs` times timed. */
async function timed(runs: number, f: () => Promise<void> | void, progress?: (i: number, t: number) => void, warmup = 0): Promise<number[]> {
  for (let i = 0; i < warmup; i++) await f();
  const out: number[] = [];
  for (let i = 0; i < runs; i++) {
    const t0 = performance.now();
    await f();
    out.push((performance.now() - t0) / 1000);
    progress?.(i + 1, out[out.length - 1]!);
  }
  return out;
}

const say = (m: string) => process.stderr.write(`  ${m}\n`);

export async function ensureSynthetic(cacheRoot: string, rows: number, seed = 1): Promise<string> {
  const dir = path.join(cacheRoot, `seed${seed}-rows${rows}`);
  if (!existsSync(path.join(dir, "synth.json"))) {
    say(`generating synthetic set: ${rows} trade rows (seed ${seed}) in ${dir}`);
    rmSync(dir, { recursive: true, force: true });
    await generateSynthetic({ tradeRows: rows, out: dir, seed });
    writeFileSync(path.join(dir, "pipeline.yaml"), synthPipeline(dir));
  }
  return dir;
}

/** The same work as the pipeline, hand-written: typed and validated reads, concordance, consumption, Parquet. */
async function rawTableStage(dir: string, out: string, memoryLimit?: string): Promise<void> {
  const s = await Session.open({ memoryLimit });
  const p = (f: string) => lit(path.join(dir, f));
  await s.run(`CREATE TABLE prod AS SELECT region, commodity, CAST(year AS BIGINT) AS year, CAST(quantity AS DOUBLE) AS quantity,
      (region IS NULL OR commodity IS NULL OR year IS NULL OR quantity IS NULL OR NOT isfinite(quantity) OR quantity < 0) AS bad
    FROM read_parquet(${p("production.parquet")})`);
  await s.run(`CREATE TABLE trade AS SELECT reporter, partner, commodity, flow, CAST(year AS BIGINT) AS year, CAST(quantity AS DOUBLE) AS quantity,
      (reporter IS NULL OR partner IS NULL OR commodity IS NULL OR flow IS NULL OR year IS NULL OR quantity IS NULL OR NOT isfinite(quantity) OR quantity < 0) AS bad
    FROM read_parquet(${p("trade.parquet")})`);
  const d1 = await s.scalar(`SELECT count(*) FROM (SELECT region, commodity, year FROM prod WHERE NOT bad GROUP BY ALL HAVING count(*) > 1)`);
  const d2 = await s.scalar(`SELECT count(*) FROM (SELECT reporter, partner, commodity, flow, year FROM trade WHERE NOT bad GROUP BY ALL HAVING count(*) > 1)`);
  const bad = await s.scalar(`SELECT (SELECT count(*) FROM prod WHERE bad) + (SELECT count(*) FROM trade WHERE bad)`);
  if (Number(d1) + Number(d2) + Number(bad) !== 0) throw new Error("synthetic data should be clean");
  await s.run(`CREATE TABLE conc AS SELECT * FROM read_parquet(${p("concordance.parquet")})`);
  await s.run(`COPY (
    WITH flows AS (
      SELECT region, commodity, year, quantity AS production, 0.0 AS imports, 0.0 AS exports FROM prod
      UNION ALL SELECT reporter, commodity, year, 0.0, CASE WHEN flow = 'import' THEN quantity ELSE 0.0 END, CASE WHEN flow = 'export' THEN quantity ELSE 0.0 END FROM trade)
    SELECT region, material, year, sum(production * factor * share) AS production, sum(imports * factor * share) AS imports, sum(exports * factor * share) AS exports,
      sum((production + imports - exports) * factor * share) AS consumption, 't' AS unit
    FROM flows JOIN conc USING (commodity) GROUP BY ALL ORDER BY ALL
  ) TO ${lit(out)} (FORMAT parquet, COMPRESSION zstd)`);
  s.close();
}

export async function tableStage(cacheRoot: string, size: Size, runs: number, memoryLimit?: string): Promise<StageResult> {
  const rows = SIZES[size];
  const dir = await ensureSynthetic(cacheRoot, rows);
  const meta = JSON.parse(readFileSync(path.join(dir, "synth.json"), "utf8"));
  const runDir = path.join(cacheRoot, "runs");
  mkdirSync(runDir, { recursive: true });
  let audit = { errors: -1, warnings: -1 };
  const ours = await timed(runs, async () => {
    const r = await runPipeline(loadPipeline(path.join(dir, "pipeline.yaml")), { out: path.join(runDir, `table-${size}`), replace: true, memoryLimit, progress: new Progress(true) });
    if (r.status !== "ok") throw new Error(`bench pipeline failed: ${r.error}`);
    audit = { errors: r.audit!.errors, warnings: r.audit!.warnings };
  }, (i, t) => say(`table stage (cairn) run ${i}/${runs}: ${t.toFixed(2)} s`));
  // Our runs come first, so the process's peak RSS so far is theirs alone (the hand-written SQL's runs may raise it after).
  const oursPeakRss = process.resourceUsage().maxRSS * 1024;
  const raw = await timed(runs, () => rawTableStage(dir, path.join(runDir, `raw-${size}.parquet`), memoryLimit), (i, t) => say(`table stage (hand-written SQL) run ${i}/${runs}: ${t.toFixed(2)} s`));
  const ms = median(ours);
  const mr = median(raw);
  return {
    stage: "table", table_rows: rows, production_rows: meta.productionRows, table_stage_s: ms, table_raw_duckdb_s: mr, table_stage_ratio: ms / mr,
    table_rows_per_s: (rows + meta.productionRows) / ms, audit_errors: audit.errors, audit_warnings: audit.warnings, runs_s: ours, raw_runs_s: raw, table_stage_peak_rss_bytes: oursPeakRss,
  };
}

/** The cohort workload: S series × Y years, G lifetime groups (normal, means 20..50, sd 30 %). */
export function cohortWorkload(series: number, years: number, groups: number, seed = 7) {
  const rnd = mulberry32(seed);
  // The inputs are made in the cohort arena, where the workers read them in place (as a caller
  // holding its data there would); an input elsewhere is copied in once per run.
  const inflow = KernelArena.shared().alloc(series * years);
  for (let i = 0; i < inflow.length; i++) inflow[i] = 1 + 99 * rnd();
  const per = Math.ceil(series / groups);
  const gs: { group: CohortGroup; from: number; n: number }[] = [];
  for (let g = 0; g < groups; g++) {
    const mean = 20 + (30 * g) / Math.max(groups - 1, 1);
    const lt = makeLifetime({ distribution: "normal", mean, sd: 0.3 * mean }, `group ${g}`);
    const c = curveOf(lt, years + 1);
    const from = g * per;
    const n = Math.max(0, Math.min(per, series - from));
    if (n > 0) gs.push({ group: new CohortGroup(years, Array(years).fill(c)), from, n });
  }
  return { inflow, groups: gs };
}

/**
 * The same inflow-driven workload written independently with numpy and OpenBLAS
 * (scripts/numpy-cohort.py), run on this machine right after cairn's, when python3 has numpy:
 * its cells/s for the model (outflow, stock, stock change) and for the product alone, and
 * cairn's speed as a multiple of numpy's model. Empty (with a note) without python3 or numpy.
 */
function numpyCohort(series: number, years: number, groups: number, cairnCellsPerS: number): Record<string, number | string> {
  const script = path.resolve(path.dirname(fileURLToPath(import.meta.url)), "..", "..", "scripts", "numpy-cohort.py");
  const py = spawnSync("python3", [script, "--series", String(series), "--years", String(years), "--groups", String(groups)], { encoding: "utf8", timeout: 20 * 60 * 1000 });
  if (py.status !== 0) {
    say(`numpy cohort reference not run (${py.error?.message ?? py.stderr.trim().split("\n").pop()})`);
    return {};
  }
  const j = JSON.parse(py.stdout.trim().split("\n").pop()!) as { inflow_driven_cells_per_s: number; product_cells_per_s: number; inflow_driven_strategy: string; outflow_max_rel_error_vs_plain_sums: number; blas?: { name?: string; version?: string } };
  if (!(j.outflow_max_rel_error_vs_plain_sums < 1e-9)) throw new Error(`bench: the numpy reference's outflow differs from plain sums by ${j.outflow_max_rel_error_vs_plain_sums}`);
  say(`numpy + ${j.blas?.name ?? "BLAS"} ${j.blas?.version ?? ""}: inflow-driven ${j.inflow_driven_cells_per_s.toExponential(2)} cells/s (${j.inflow_driven_strategy}), product alone ${j.product_cells_per_s.toExponential(2)} cells/s`);
  return {
    numpy_inflow_driven_cells_per_s: j.inflow_driven_cells_per_s, numpy_product_cells_per_s: j.product_cells_per_s,
    numpy_blas: `${j.blas?.name ?? "unknown"} ${j.blas?.version ?? ""}`.trim(),
    inflow_speed_ratio_to_numpy: cairnCellsPerS / j.inflow_driven_cells_per_s,
  };
}

export async function cohortStage(series: number, years: number, groups: number, runs: number): Promise<StageResult> {
  const w = cohortWorkload(series, years, groups);
  const cells = series * years * (years + 1) / 2;
  const pool = CohortPool.shared();
  const slices = w.groups.map((g) => w.inflow.subarray(g.from * years, (g.from + g.n) * years));
  // Each run's results go back to the arena before the next; the last run's are kept for checks.
  let last: ModelResult[] = [];
  const inflowT = await timed(runs, async () => {
    recycle(...last.map((r) => ({ outflow: r.outflow, stock: r.stock, stockChange: r.stockChange })));
    last = await runTasks(w.groups.map((g, i) => taskFor("inflow", g.group, slices[i]!, g.n)), pool);
  }, (i, t) => say(`inflow-driven run ${i}/${runs}: ${t.toFixed(2)} s (${pool.size} workers)`), 1);
  const fromInflow = last;
  last = [];
  // The kernels' outflow and stock against the plain sums, for a few series of every 10th group:
  // outflow(t) = Σ_{c ≤ t} I(c)·P[c, t], stock(t) = Σ_{c ≤ t} I(c)·(1 − Σ_{u ≤ t} P[c, u]).
  let kernelErr = 0;
  w.groups.forEach((g, gi) => {
    if (gi % 10) return;
    const P = g.group.P;
    for (const s of [0, g.n - 1]) {
      const I = w.inflow.subarray((g.from + s) * years, (g.from + s + 1) * years);
      let stockSum = 0;
      for (let t = 0; t < years; t++) {
        let out = 0;
        stockSum = 0;
        for (let c = 0; c <= t; c++) {
          out += I[c]! * P[c * years + t]!;
          let left = 1;
          for (let u = c; u <= t; u++) left -= P[c * years + u]!;
          stockSum += I[c]! * left;
        }
        const r = fromInflow[gi]!;
        kernelErr = Math.max(kernelErr, Math.abs(r.outflow[s * years + t]! - out) / Math.max(out, 1e-300), Math.abs(r.stock[s * years + t]! - stockSum) / Math.max(stockSum, 1e-300));
      }
    }
  });
  if (!(kernelErr < 1e-9)) throw new Error(`bench: inflow-driven results differ from the plain sums by ${kernelErr} (relative)`);
  const stockT = await timed(runs, async () => {
    recycle(...last.map((r) => ({ inflow: r.inflow, outflow: r.outflow, stock: r.stock, stockChange: r.stockChange })));
    last = await runTasks(w.groups.map((g, gi) => taskFor("stock", g.group, fromInflow[gi]!.stock, g.n)), pool);
  }, (i, t) => say(`stock-driven run ${i}/${runs}: ${t.toFixed(2)} s`), 1);
  // The stock-driven model on the inflow-driven stock must give the inflow back.
  let maxErr = 0;
  last.forEach((r, gi) => {
    const g = w.groups[gi]!;
    for (let i = 0; i < r.inflow.length; i += 997) maxErr = Math.max(maxErr, Math.abs(r.inflow[i]! - w.inflow[g.from * years + i]!) / w.inflow[g.from * years + i]!);
  });
  recycle(...last.map((r) => ({ inflow: r.inflow, outflow: r.outflow, stock: r.stock, stockChange: r.stockChange })));
  recycle(...fromInflow.map((r) => ({ outflow: r.outflow, stock: r.stock, stockChange: r.stockChange })));
  last = [];
  const M = 3;
  const contents = w.groups.map((g) => {
    const content = KernelArena.shared().alloc(g.n * M * years);
    for (let s = 0; s < g.n; s++) for (let m = 0; m < M; m++) for (let c = 0; c < years; c++) content[(s * M + m) * years + c] = (m + 1) * 0.1 + (c < years / 2 ? 0 : 0.05);
    return content;
  });
  const compT = await timed(runs, async () => {
    recycle(...last.map((r) => ({ inflow: r.inflow, outflow: r.outflow, stock: r.stock, stockChange: r.stockChange })));
    last = await runTasks(w.groups.map((g, i) => taskFor("composition", g.group, slices[i]!, g.n, { content: contents[i]!, M })), pool);
  }, (i, t) => say(`composition (3 materials) run ${i}/${runs}: ${t.toFixed(2)} s`), 1);
  await CohortPool.closeShared();
  return {
    ...numpyCohort(series, years, groups, cells / median(inflowT)),
    stage: "cohort", cohort_series: series, cohort_years: years, cohort_groups: groups, cells_per_run: cells,
    inflow_driven_s: median(inflowT), stock_driven_s: median(stockT), composition_s: median(compT),
    inflow_driven_cells_per_s: cells / median(inflowT), stock_driven_cells_per_s: cells / median(stockT),
    composition_cells_per_s: cells / median(compT), round_trip_max_rel_error: maxErr, kernel_check_max_rel_error: kernelErr,
    inflow_driven_runs_s: inflowT, stock_driven_runs_s: stockT, composition_runs_s: compT,
    cohort_kernels: `${kernelDescription()}, ${pool.size} worker threads, in place in the cohort arena`,
  };
}

export async function handoffStage(values: number, runs: number): Promise<StageResult> {
  const s = await Session.open();
  await s.run(`CREATE TABLE src AS SELECT CAST(i AS DOUBLE) * 0.5 AS v FROM range(${values}) t(i)`);
  let check = 0;
  // Into buffers kept from run to run (as a reading loop keeps them): the first, untimed run
  // pays the page faults of fresh memory (handoff_read_fresh_s); one more warms DuckDB's own buffers.
  const buffers = new ReadBuffers();
  const fresh = await timed(1, async () => {
    const r = await readColumns(s, "SELECT v FROM src", ["f64"], buffers);
    check = (r.columns[0] as Float64Array)[values - 1]!;
  });
  const readT = await timed(runs, async () => {
    const r = await readColumns(s, "SELECT v FROM src", ["f64"], buffers);
    check = (r.columns[0] as Float64Array)[values - 1]!;
  }, (i, t) => say(`hand-off read run ${i}/${runs}: ${t.toFixed(2)} s`), 1);
  if (check !== (values - 1) * 0.5) throw new Error("hand-off read mismatch");
  const a = new Int32Array(values).map((_, i) => i % 100000);
  const b = new Int32Array(values).map((_, i) => i % 200);
  const v = new Float64Array(values).map((_, i) => i * 0.25);
  // Row order not kept (as the pipeline writes its result tables, read back with ORDER BY):
  // with the native hand-off, row ranges are appended from every core at once.
  const writeT = await timed(runs, () => writeColumns(s, "dst", [{ name: "a", kind: "i32", data: a }, { name: "b", kind: "i32", data: b }, { name: "v", kind: "f64", data: v }], values),
    (i, t) => say(`hand-off write run ${i}/${runs}: ${t.toFixed(2)} s`));
  const [chk] = await s.all("SELECT count(*) AS n, sum(a) AS sa, sum(b) AS sb, sum(v) AS sv FROM dst");
  const sum = (x: ArrayLike<number>) => { let t = 0; for (let i = 0; i < x.length; i++) t += x[i]!; return t; };
  if (Number(chk!.n) !== values || Number(chk!.sa) !== sum(a) || Number(chk!.sb) !== sum(b) || Number(chk!.sv) !== sum(v)) throw new Error("hand-off write mismatch");
  s.close();
  return { stage: "handoff", handoff_values: values, handoff_native: nativeReader() ? "native reader and in-place scans" : "bindings' calls", handoff_read_runs_s: readT, handoff_read_fresh_s: fresh[0]!, handoff_write_runs_s: writeT, handoff_read_values_per_s: values / median(readT), handoff_write_rows_per_s: values / median(writeT) };
}

/** Cohort-resolved output through the pipeline step: inflow for S series × Y years, by_cohort: true. */
export async function byCohortStage(cacheRoot: string, series: number, years: number, memoryLimit: string): Promise<StageResult> {
  const dir = path.join(cacheRoot, `bycohort-${series}x${years}`);
  mkdirSync(dir, { recursive: true });
  const s = await Session.open();
  await s.run(`COPY (SELECT 'S' || lpad(CAST(i // ${years} AS VARCHAR), 6, '0') AS series, CAST(2000 - ${years} + 1 + i % ${years} AS INTEGER) AS year,
      1 + (hash(i, 3) % 1000) / 10.0 AS value FROM range(${series * years}) t(i)) TO ${lit(path.join(dir, "inflow.parquet"))} (FORMAT parquet)`);
  s.close();
  writeFileSync(path.join(dir, "lifetimes.csv"), "distribution,mean,sd\nnormal,30,9\n");
  writeFileSync(path.join(dir, "p.yaml"), `name: bycohort
sources:
  inflow:
    path: inflow.parquet
    unit: t
    columns: { series: { type: text, key: true }, year: { type: integer, key: true }, value: quantity }
  lifetimes:
    path: lifetimes.csv
    columns: { distribution: text, mean: number, sd: number }
steps:
  - id: m
    kind: cohort-model
    mode: inflow-driven
    input: inflow
    keys: [series]
    lifetimes: lifetimes
    by_cohort: true
    indicators: false
`);
  const t0 = performance.now();
  const r = await runPipeline(loadPipeline(path.join(dir, "p.yaml")), { out: path.join(dir, "run"), replace: true, memoryLimit, progress: new Progress(true) });
  const t = (performance.now() - t0) / 1000;
  if (r.status !== "ok") throw new Error(`by-cohort run failed: ${r.error}`);
  const rows = r.outputs.filter((o) => o.table === "m_by_cohort").reduce((a, o) => a + o.rows, 0);
  return { stage: "by_cohort", by_cohort_series: series, by_cohort_years: years, by_cohort_rows: rows, by_cohort_s: t, by_cohort_rows_per_s: rows / t, by_cohort_memory_limit: memoryLimit };
}
