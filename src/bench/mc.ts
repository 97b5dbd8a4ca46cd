/**
 * The Monte Carlo stage: D draws of S series × T years with G normal lifetime groups (means 20
 * to 50 years, sd 30 % of the mean); each draw scales each group's mean by a normal factor of
 * mean 1 and sd 10 % (truncated at 0); inflow-driven; the mean and the 5/25/50/75/95 %
 * quantiles of the stock per series and year. A cell is one series × year × cohort term of one
 * draw (D·S·T(T+1)/2 in all), as in the cohort stage.
 *
 * A check that can fail: the total over all series is summed per draw; its mean must equal the
 * sum of the series' means (linearity of expectation) to rounding.
 */
import { spawnSync } from "node:child_process";
import path from "node:path";
import { fileURLToPath } from "node:url";
import { mulberry32 } from "../data/prng.js";
import { runMonteCarlo } from "../uncertainty/mc.js";
import type { McJob } from "../uncertainty/mc-types.js";
import { Rng } from "../uncertainty/random.js";
import { sampleInputs } from "../uncertainty/designs.js";
import { factorMarginal } from "../uncertainty/spreads.js";
import type { StageResult } from "./stages.js";

export function mcWorkload(draws: number, series: number, years: number, groups: number, seed = 7): McJob {
  const rnd = mulberry32(seed);
  const values = new Float64Array(series * years);
  for (let i = 0; i < values.length; i++) values[i] = 1 + 99 * rnd();
  const per = Math.ceil(series / groups);
  const rows: McJob["rows"] = [];
  const gs: McJob["groups"] = [];
  for (let g = 0; g < groups; g++) {
    const mean = 20 + (30 * g) / Math.max(groups - 1, 1);
    rows.push({ distribution: "normal", mean, sd: 0.3 * mean, label: String(g + 1) });
    const from = g * per;
    const n = Math.max(0, Math.min(per, series - from));
    if (n > 0) gs.push({ sids: Int32Array.from({ length: n }, (_, i) => from + i), cohortRow: new Int32Array(years).fill(g), initRow: null, initFixed: null });
  }
  // One factor per group and draw: rows × 4 parameters × draws, only the mean varied.
  const f = factorMarginal({ family: "normal", rel_sd: 0.1, truncate_below: 0 });
  const u = sampleInputs(Array(groups).fill(f), "random", draws, new Rng(seed));
  const ltValues = new Float64Array(groups * 4 * draws).fill(NaN);
  for (let g = 0; g < groups; g++) for (let d = 0; d < draws; d++) ltValues[(g * 4) * draws + d] = rows[g]!.mean! * u[d * groups + g]!;
  const idx = new Int32Array(3 * draws);
  for (let d = 0; d < draws; d++) idx.fill(d, 3 * d, 3 * d + 3);
  return {
    step: "bench", mode: "inflow-driven", clamp: false, n: series, T: years, A: 0, curveLength: years + 1, runs: draws, idx,
    rows, tables: {}, ltValues, ltDraws: draws, groups: gs, values, initAmounts: null, M: 0, content: null, initContent: null,
    ctFactors: null, ctDraws: draws, input: null, probabilities: [0.05, 0.25, 0.5, 0.75, 0.95], variables: ["stock"],
    totals: { index: new Int32Array(series), levels: 1, cells: 1 }, sobol: null,
  };
}

export async function mcStage(draws: number, series: number, years: number, groups: number): Promise<StageResult> {
  const job = mcWorkload(draws, series, years, groups);
  const t0 = performance.now();
  let last = 0;
  const r = await runMonteCarlo(job, {
    progress: (done, total) => {
      const now = performance.now();
      if (now - last > 2000 || done === total) {
        process.stderr.write(`  Monte Carlo: ${done}/${total} chunks, ${((now - t0) / 1000).toFixed(1)} s\n`);
        last = now;
      }
    },
  });
  const s = (performance.now() - t0) / 1000;
  const cells = draws * series * years * (years + 1) / 2;
  // Linearity check on the total stock of every year.
  let worst = 0;
  for (let t = 0; t < years; t++) {
    let sum = 0;
    for (let i = 0; i < series; i++) sum += r.stats[2]!.mean[i * years + t]!;
    const tot = r.totalStats!.mean[2 * years + t]!;
    worst = Math.max(worst, Math.abs(tot - sum) / Math.max(1, Math.abs(sum)));
  }
  if (!(worst < 1e-9)) throw new Error(`Monte Carlo check failed: mean of the per-draw totals differs from the sum of the series' means by ${worst.toExponential(2)} (relative)`);
  // The same workload written independently with numpy, scipy and OpenBLAS (scripts/numpy-mc.py), when python3 has them.
  const script = path.resolve(path.dirname(fileURLToPath(import.meta.url)), "..", "..", "scripts", "numpy-mc.py");
  const py = spawnSync("python3", [script, String(draws), String(series), String(years), String(groups), String(r.threads)], { encoding: "utf8", timeout: 30 * 60 * 1000 });
  let numpy: Record<string, number> = {};
  if (py.status === 0) {
    const j = JSON.parse(py.stdout.trim().split("\n").pop()!) as { numpy_mc_s: number; numpy_mc_cells_per_s: number };
    numpy = { numpy_mc_s: j.numpy_mc_s, numpy_mc_cells_per_s: j.numpy_mc_cells_per_s, mc_speed_ratio_to_numpy: j.numpy_mc_s / s };
  } else process.stderr.write(`  numpy Monte Carlo reference not run (${py.error?.message ?? py.stderr.trim().split("\n").pop()})\n`);
  return { ...numpy, stage: "mc", mc_draws: draws, mc_series: series, mc_years: years, mc_groups: groups, mc_s: s, mc_cells_per_s: cells / s, mc_threads: r.threads, mc_chunks: r.chunks, mc_total_mean_rel_error: worst };
}
