/**
 * Running the models group by group: the stock in place as amounts by age, the model (on the
 * worker pool when the work is large), the material composition of every cohort including
 * those in place, the cohort-resolved rows streamed to files, and the end state kept for a
 * model that continues this one.
 */
import path from "node:path";
import { DataError } from "../../errors.js";
import { ident } from "../../engine/sql.js";
import {
  CohortGroup, composition, initialAmounts, initialCohorts, initialContribution, inflowDriven, stockDriven,
  byCohortRows, fillByCohort, type InitialStock, type ModelResult,
} from "../../cohort/index.js";
import { CohortPool, recycle, runTasks, taskFor } from "../../cohort/pool.js";
import { ByCohortWriter } from "../../ops/by-cohort-writer.js";
import { describeSeries } from "../../ops/param-match.js";
import type { StepContext } from "../types.js";
import type { CohortState } from "./carry.js";
import { groupContent } from "./content.js";
import type { Group } from "./groups.js";
import { sidTable, type Inputs } from "./inputs.js";
import type { O } from "./options.js";
import type { ParamRow } from "./params.js";

export interface Results {
  inflow: Float64Array;
  outflow: Float64Array;
  stock: Float64Array;
  stockChange: Float64Array;
  meanAgeStock: Float64Array;
  meanAgeOutflow: Float64Array;
  unmet: Float64Array | null;
  tooOld: Float64Array;
  materials: string[];
  /** (n·M) × T material flows, and the Σ-content check (n × T), or null without content. */
  mat: { inflow: Float64Array; outflow: Float64Array; stock: Float64Array; stockChange: Float64Array; sumCheck: Float64Array } | null;
  hasContent: Uint8Array;
  /** n × M: the series holds the material (only those rows are published). */
  holds: Uint8Array;
  /** Content per unit of product summed over materials, per series and cohort: at most 1 where the product is a mass. */
  contentTotals: { items: number; failing: { sid: number; cohort: number; total: number }[] };
  byCohort: ByCohortWriter | null;
}

const gather = (src: Float64Array, sids: readonly number[], width: number) => {
  const x = new Float64Array(sids.length * width);
  sids.forEach((sid, j) => x.set(src.subarray(sid * width, sid * width + width), j * width));
  return x;
};

/** The stock in place of a group by age (gn × A): given by age, steady-state shares of a total, or carried. */
export function amountsOf(inp: Inputs, g: Group, A: number): Float64Array | null {
  if (!g.initCurves.length) return null;
  if (inp.carried) {
    const { stock, from } = inp.carried;
    const out = new Float64Array(g.sids.length * A);
    g.sids.forEach((sid, j) => out.set(stock.amounts.subarray(from[sid]! * A, from[sid]! * A + A), j * A));
    return out;
  }
  if (inp.init!.byAge) return gather(inp.init!.byAge, g.sids, A);
  const spec: InitialStock = { byAge: null, total: gather(inp.init!.total!, g.sids, 1), A, curves: g.initCurves };
  return initialAmounts(spec, g.sids.length);
}

export async function compute(ctx: StepContext, o: O, inp: Inputs, groups: Group[], A: number,
  content: { rows: ParamRow[]; keyCols: string[] } | null, materials: string[]): Promise<Results> {
  const { n, T, y0 } = inp;
  const M = materials.length;
  const res: Results = {
    inflow: new Float64Array(n * T), outflow: new Float64Array(n * T), stock: new Float64Array(n * T), stockChange: new Float64Array(n * T),
    meanAgeStock: new Float64Array(n * T).fill(NaN), meanAgeOutflow: new Float64Array(n * T).fill(NaN),
    unmet: o.mode === "stock-driven" && o.negative_inflow === "clamp" ? new Float64Array(n * T) : null,
    tooOld: new Float64Array(n), materials,
    mat: M ? { inflow: new Float64Array(n * M * T), outflow: new Float64Array(n * M * T), stock: new Float64Array(n * M * T), stockChange: new Float64Array(n * M * T), sumCheck: new Float64Array(n * T) } : null,
    hasContent: new Uint8Array(n), holds: new Uint8Array(n * M), contentTotals: { items: 0, failing: [] }, byCohort: null,
  };
  const keep = ctx.carry.wanted.has(o.id);
  const state: CohortState | null = keep
    ? {
      step: o.id, keys: o.keys, keyValues: inp.keyValues, y0, T, unit: inp.unit, groupOf: new Int32Array(n), groups: [], inflow: res.inflow,
      initAmounts: A ? new Float64Array(n * A) : null, A, materials, content: M ? new Float64Array(n * M * T) : null,
      initContent: M && A ? new Float64Array(n * M * A) : null, hasContent: res.hasContent,
    }
    : null;
  const tick = ctx.progress.counter(`step ${o.id}: series`, n);
  let done = 0;
  const bcName = `${o.id}_by_cohort`;
  const bcw = o.by_cohort
    ? new ByCohortWriter(ctx.session, bcName, path.join(ctx.outputDir, `.${bcName}.parts`), ctx.outputDir, o.keys.map((k) => `m.${ident(k)}`).join(", "), sidTable(o), y0, inp.unit, T, n)
    : null;
  res.byCohort = bcw;
  const prepared = groups.map((g, gi) => {
    const group = new CohortGroup(T, g.curves);
    const gn = g.sids.length;
    const amounts = amountsOf(inp, g, A);
    const initSpec: InitialStock | null = amounts ? { byAge: amounts, total: new Float64Array(gn), A, curves: g.initCurves } : null;
    const init = initSpec ? initialContribution(initSpec, gn, T) : null;
    if (o.mode === "stock-driven") {
      for (let c = 0; c < T; c++) {
        if (!(group.S[c * T + c]! > 0)) throw new DataError(`step ${o.id}: series ${describeSeries(o.keys, inp.keyValues[g.sids[0]!]!)}, cohort ${y0 + c}: σ(0) = 0 (everything leaves in the year of entry), so no inflow can build a stock`);
      }
    }
    if (state) {
      g.sids.forEach((sid, j) => {
        state.groupOf[sid] = gi;
        if (amounts) state.initAmounts!.set(amounts.subarray(j * A, j * A + A), sid * A);
      });
      state.groups.push({ curves: g.curves, initCurves: g.initCurves as never });
    }
    return { g, group, gn, init, initSpec, amounts, v: gather(inp.value, g.sids, T) };
  });
  const cells = n * T * (T + 1) / 2;
  const usePool = cells >= ctx.settings.poolMinCells && CohortPool.shared().size > 1;
  const clamp = o.negative_inflow === "clamp";
  const results: ModelResult[] = usePool
    ? await runTasks(prepared.map((x) => taskFor(o.mode === "inflow-driven" ? "inflow" : "stock", x.group, x.v, x.gn, { indicators: o.indicators, initial: x.init, clamp })))
    : [];
  if (usePool) ctx.progress.info(`step ${o.id}: ${prepared.length} lifetime groups on ${CohortPool.shared().size} worker threads`);
  for (const [gi, x] of prepared.entries()) {
    const { g, group, gn } = x;
    const scatter = (dst: Float64Array, src: Float64Array, width: number) => g.sids.forEach((sid, j) => dst.set(src.subarray(j * width, j * width + width), sid * width));
    const r: ModelResult = usePool
      ? results[gi]!
      : o.mode === "inflow-driven"
        ? inflowDriven(x.group, x.v, gn, { indicators: o.indicators, initial: x.init })
        : stockDriven(x.group, x.v, gn, { indicators: o.indicators, initial: x.init, clamp });
    scatter(res.inflow, r.inflow, T);
    scatter(res.outflow, r.outflow, T);
    scatter(res.stock, r.stock, T);
    scatter(res.stockChange, r.stockChange, T);
    if (r.meanAgeStock) scatter(res.meanAgeStock, r.meanAgeStock, T);
    if (r.meanAgeOutflow) scatter(res.meanAgeOutflow, r.meanAgeOutflow, T);
    if (r.unmet && res.unmet) scatter(res.unmet, r.unmet, T);
    if (r.initialTooOld) g.sids.forEach((sid, j) => (res.tooOld[sid] = r.initialTooOld![j]!));
    if (res.mat) composeGroup(o, inp, x, A, materials, content, r, res, state);
    if (usePool) recycle(r); // the arena keeps the memory for the next group
    done += gn;
    if (!bcw) tick(done);
  }
  if (bcw) await writeByCohort(bcw, prepared, res.inflow, T, n, tick);
  if (state) ctx.carry.keep(state);
  return res;
}

/**
 * The cohort-resolved rows, series by series in the order of their keys (sid), whatever lifetime
 * group each is in: each series' cohorts in place (entered before the first model year), then
 * its model cohorts. The writer's parts are then the table sorted by its keys, cut where the
 * next series' rows do not fit, which a merge of shards can cut the same way.
 */
async function writeByCohort(bcw: ByCohortWriter, prepared: { g: Group; group: CohortGroup; gn: number; initSpec: InitialStock | null }[],
  inflow: Float64Array, T: number, n: number, tick: (done: number) => void): Promise<void> {
  const rows = byCohortRows(T);
  const at = new Int32Array(n).fill(-1); // the series' group
  prepared.forEach((x, gi) => x.g.sids.forEach((sid) => (at[sid] = gi)));
  // The cohorts in place come from one generator per group, taken in step (a group's series are in sid order).
  const init = prepared.map((x) => (x.initSpec ? initialCohorts(x.initSpec, x.gn, T) : null));
  for (let sid = 0; sid < n; sid++) {
    const gi = at[sid]!;
    if (gi < 0) continue;
    const x = prepared[gi]!;
    const gen = init[gi];
    if (gen) {
      const chunk = gen.next();
      if (chunk.done || x.g.sids[chunk.value.s] !== sid) throw new Error(`cohort model: cohorts in place out of step for series ${sid}`);
      await bcw.add(sid, chunk.value.cohort, chunk.value.year, chunk.value.inflow, chunk.value.outflow, chunk.value.stock);
    }
    fillByCohort(x.group, inflow.subarray(sid * T, (sid + 1) * T), rows);
    await bcw.add(sid, rows.cohort, rows.year, rows.inflow, rows.outflow, rows.stock);
    if (sid % 64 === 63 || sid === n - 1) tick(sid + 1);
  }
}

/** Material flows of one group: the model run on inflow × content, the cohorts in place with their own content. */
function composeGroup(o: O, inp: Inputs, x: { g: Group; group: CohortGroup; gn: number; amounts: Float64Array | null },
  A: number, materials: string[], content: { rows: ParamRow[]; keyCols: string[] } | null, r: ModelResult, res: Results, state: CohortState | null): void {
  const { g, group, gn, amounts } = x;
  const { T } = inp;
  const M = materials.length;
  const gc = groupContent(o, inp, g, A, materials, content, amounts);
  let initMat = null;
  let initSum = null;
  if (amounts) {
    const byAge = new Float64Array(gn * M * A);
    const sumAge = new Float64Array(gn * A);
    for (let j = 0; j < gn; j++) for (let a = 0; a < A; a++) {
      const q = amounts[j * A + a]!;
      if (q === 0) continue;
      for (let m = 0; m < M; m++) byAge[(j * M + m) * A + a] = q * gc.initContent[(j * M + m) * A + a]!;
      sumAge[j * A + a] = q * gc.initTotal[j * A + a]!;
    }
    // Each material row of a series keeps the series' curves: one curve list serves n·M rows.
    initMat = initialContribution({ byAge, total: new Float64Array(gn * M), A, curves: g.initCurves }, gn * M, T);
    initSum = initialContribution({ byAge: sumAge, total: new Float64Array(gn), A, curves: g.initCurves }, gn, T);
  }
  const rm = composition(group, r.inflow, gn, gc.content, M, initMat);
  const rsum = composition(group, r.inflow, gn, gc.total, 1, initSum);
  const mat = res.mat!;
  // Content summed over materials: a cohort cannot hold more material than its own mass.
  if (inp.unit !== "piece") {
    g.sids.forEach((sid, j) => {
      if (!gc.has[j]) return;
      for (let c = 0; c < T; c++) {
        res.contentTotals.items++;
        if (gc.total[j * T + c]! > 1 + 1e-9) res.contentTotals.failing.push({ sid, cohort: inp.y0 + c, total: gc.total[j * T + c]! });
      }
      for (let a = 0; a < A; a++) {
        if (!amounts || amounts[j * A + a] === 0) continue;
        res.contentTotals.items++;
        if (gc.initTotal[j * A + a]! > 1 + 1e-9) res.contentTotals.failing.push({ sid, cohort: inp.y0 - 1 - a, total: gc.initTotal[j * A + a]! });
      }
    });
  }
  g.sids.forEach((sid, j) => {
    if (!gc.has[j]) return;
    res.hasContent[sid] = 1;
    res.holds.set(gc.holds.subarray(j * M, (j + 1) * M), sid * M);
    for (let m = 0; m < M; m++) {
      const from = (j * M + m) * T;
      const to = (sid * M + m) * T;
      mat.inflow.set(rm.inflow.subarray(from, from + T), to);
      mat.outflow.set(rm.outflow.subarray(from, from + T), to);
      mat.stock.set(rm.stock.subarray(from, from + T), to);
      mat.stockChange.set(rm.stockChange.subarray(from, from + T), to);
    }
    mat.sumCheck.set(rsum.stock.subarray(j * T, j * T + T), sid * T);
    if (state) {
      state.content!.set(gc.content.subarray(j * M * T, (j + 1) * M * T), sid * M * T);
      if (state.initContent) state.initContent.set(gc.initContent.subarray(j * M * A, (j + 1) * M * A), sid * M * A);
    }
  });
}
