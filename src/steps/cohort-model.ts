/**
 * `cohort-model`: inflow-driven or stock-driven cohort models per series (keys), with lifetimes
 * matched by key and cohort, optional initial stock, material composition by cohort, and
 * cohort-resolved output on request. Data move as typed arrays; the numeric work is src/cohort.
 */
import { z } from "zod";
import { Name } from "../spec/common.js";
import { DataError } from "../errors.js";
import type { Session } from "../engine/session.js";
import { ident, idents, keyMap, lit } from "../engine/sql.js";
import { readColumns, writeColumns, type OutColumn } from "../engine/handoff.js";
import {
  ALL_PARAMS, CohortGroup, composition, curveOf, DISTRIBUTION_NAMES, initialContribution, inflowDriven, makeLifetime,
  stockDriven, ageHorizon, byCohort, initialCohorts, type Curve, type InitialContribution, type InitialStock, type ModelResult,
} from "../cohort/index.js";
import { defineStep, type StepContext } from "./types.js";
import { candidates, describeSeries, pick, type MatchRow } from "./cohort-match.js";
import { ByCohortWriter } from "./by-cohort-writer.js";
import { CohortPool, recycle, runTasks, taskFor } from "../cohort/pool.js";

/** Below this many cells a step runs its models in the main thread (worker start-up costs more). */
const POOL_MIN_CELLS = Number(process.env.CAIRN_POOL_MIN_CELLS ?? 2e8);
import type { OutputFile } from "../publish/parquet.js";
import path from "node:path";

const Options = z.object({
  mode: z.enum(["inflow-driven", "stock-driven"]),
  input: Name.describe("long table: keys…, year, value column (inflow or stock)"),
  keys: z.array(Name).min(1).describe("series key columns"),
  value: Name.default("value").describe("the input column holding the inflow or the stock (default value)"),
  lifetimes: Name.describe("lifetimes table: any subset of the key columns, first_cohort, last_cohort, distribution, mean, sd, shape, scale, curve"),
  curves: Name.optional().describe("curves table (curve, age, survival) for distribution table"),
  initial_stock: Name.optional().describe("table: keys…, value (stock at the end of the year before the first model year), optional age"),
  content: Name.optional().describe("table: key columns (empty = any), material, first_cohort, last_cohort, content (material per unit of product)"),
  by_cohort: z.boolean().default(false).describe("also produce <id>_by_cohort (adds cohort)"),
  negative_inflow: z.enum(["keep", "clamp"]).default("keep").describe("stock-driven: keep negative inflow (flagged) or clamp it to 0 and report the unmet stock change"),
  indicators: z.boolean().default(true).describe("mean age of the stock and of the outflow per series-year"),
  convention: z.enum(["midpoint"]).default("midpoint").describe("discrete-time convention (DOMAIN: items enter mid-year)"),
});
type O = z.output<typeof Options> & { id: string };

const LIFETIME_COLS = ["first_cohort", "last_cohort", "distribution", ...ALL_PARAMS];

interface SeriesInfo {
  n: number;
  keyValues: string[][];
}

async function seriesIndex(s: Session, o: O): Promise<SeriesInfo> {
  const k = idents(o.keys);
  await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(`__${o.id}_sid`)} AS
    SELECT CAST(row_number() OVER (ORDER BY ${k}) - 1 AS INTEGER) AS sid, ${k} FROM (SELECT DISTINCT ${k} FROM ${ident(o.input)})`);
  const rows = await s.all(`SELECT ${o.keys.map((c) => `CAST(${ident(c)} AS VARCHAR) AS ${ident(c)}`).join(", ")} FROM ${ident(`__${o.id}_sid`)} ORDER BY sid`);
  return { n: rows.length, keyValues: rows.map((r) => o.keys.map((c) => String(r[c]))) };
}

async function readMatrix(s: Session, table: string, o: O, valueExpr: string, n: number, T: number, y0: number): Promise<{ m: Float64Array; present: Uint8Array }> {
  const { rows, columns } = await readColumns(s,
    `SELECT m.sid, CAST(i.year - ${y0} AS INTEGER) AS yi, CAST(${valueExpr} AS DOUBLE) AS v
     FROM ${ident(table)} i JOIN ${ident(`__${o.id}_sid`)} m USING (${idents(o.keys)})`, ["i32", "i32", "f64"]);
  const [sid, yi, v] = columns as [Int32Array, Int32Array, Float64Array];
  const m = new Float64Array(n * T);
  const present = new Uint8Array(n * T);
  for (let r = 0; r < rows; r++) {
    const idx = sid[r]! * T + yi[r]!;
    m[idx] = v[r]!;
    present[idx] = 1;
  }
  return { m, present };
}

interface LifetimeRow extends MatchRow {
  raw: Record<string, unknown>;
}

async function paramRows(s: Session, table: string, o: O, accepted: string[], what: string): Promise<{ rows: LifetimeRow[]; keyCols: string[] }> {
  const cols = (await s.columns(table)).map((c) => c.name);
  const keyCols = cols.filter((c) => o.keys.includes(c));
  const unknown = cols.filter((c) => !o.keys.includes(c) && !accepted.includes(c) && c !== "unit");
  if (unknown.length) {
    throw new DataError(`step ${o.id}: ${what} table ${table} has unknown column(s) ${unknown.join(", ")}; accepted: the series keys (${o.keys.join(", ")}) and ${accepted.join(", ")}`);
  }
  const data = await s.all(`SELECT * FROM ${ident(table)}`);
  const rows = data.map((r, index) => {
    const keys: Record<string, string> = {};
    for (const k of keyCols) {
      const v = r[k];
      if (v !== null && v !== undefined && String(v) !== "") keys[k] = String(v);
    }
    const num = (x: unknown) => (x === null || x === undefined || x === "" ? null : Number(x));
    return { index, keys, first: num(r.first_cohort), last: num(r.last_cohort), specificity: Object.keys(keys).length, raw: r };
  });
  return { rows, keyCols };
}

export const cohortModelStep = defineStep({
  kind: "cohort-model",
  summary: "inflow-driven or stock-driven cohort (dynamic stock) model per series, with lifetimes by key and cohort, initial stock, composition by cohort",
  options: Options,
  reads: (o) => [o.input, o.lifetimes, ...(o.curves ? [o.curves] : []), ...(o.initial_stock ? [o.initial_stock] : []), ...(o.content ? [o.content] : [])],
  async run(ctx, step) {
    const o = step as O;
    return runCohortModel(ctx, o);
  },
});

async function runCohortModel(ctx: StepContext, o: O) {
  const s = ctx.session;
  const a = ctx.pipeline.audit;
  for (const [opt, t] of [["input", o.input], ["lifetimes", o.lifetimes], ["curves", o.curves], ["initial_stock", o.initial_stock], ["content", o.content]] as const) {
    if (t) ctx.requireTable(t, opt);
  }
  const inCols = await ctx.columnsOf(o.input);
  const missing = [...o.keys, "year", o.value].filter((c) => !inCols.includes(c));
  if (missing.length) throw new DataError(`step ${o.id}: input ${o.input} lacks column(s) ${missing.join(", ")}; it has ${inCols.join(", ")}`);
  const K = idents(o.keys);
  // Units: one per input table.
  let unit = ctx.pipeline.base_unit;
  if (inCols.includes("unit")) {
    const units = await s.all(`SELECT DISTINCT CAST(unit AS VARCHAR) AS u FROM ${ident(o.input)} ORDER BY 1`);
    if (units.length > 1) throw new DataError(`step ${o.id}: input ${o.input} mixes units ${units.map((u) => u.u).join(", ")}; a cohort model needs one unit per input table`);
    if (units.length === 1 && units[0]!.u !== null) unit = String(units[0]!.u);
  }
  // Input problems: NULL values, duplicate series-years.
  const nulls = await s.all(`SELECT ${K}, year FROM ${ident(o.input)} WHERE ${ident(o.value)} IS NULL OR year IS NULL OR NOT isfinite(CAST(${ident(o.value)} AS DOUBLE)) LIMIT 3`);
  if (nulls.length) throw new DataError(`step ${o.id}: input ${o.input} has missing or non-finite ${o.value} (e.g. ${JSON.stringify(nulls[0])})`);
  const dups = await s.all(`SELECT ${K}, year, count(*) AS n FROM ${ident(o.input)} GROUP BY ALL HAVING count(*) > 1 ORDER BY ALL LIMIT 3`);
  if (dups.length) throw new DataError(`step ${o.id}: input ${o.input} has several rows for one series-year, e.g. ${JSON.stringify(dups[0])}; aggregate first`);
  const span = await s.one(`SELECT min(year) AS y0, max(year) AS y1, count(*) AS n FROM ${ident(o.input)}`);
  if (Number(span.n) === 0) throw new DataError(`step ${o.id}: input ${o.input} is empty`);
  const y0 = Number(span.y0);
  const y1 = Number(span.y1);
  const T = y1 - y0 + 1;
  const ser = await seriesIndex(s, o);
  const n = ser.n;
  ctx.progress.info(`step ${o.id}: ${n} series × ${T} years (${y0}–${y1}), ${o.mode}`);
  const { m: value, present } = await readMatrix(s, o.input, o, ident(o.value), n, T, y0);

  // Coverage: missing series-years.
  const missingSY: number[] = [];
  for (let i = 0; i < n * T; i++) if (!present[i]) missingSY.push(i);
  if (missingSY.length && o.mode === "stock-driven") {
    const i = missingSY[0]!;
    throw new DataError(`step ${o.id}: the stock path of series ${describeSeries(o.keys, ser.keyValues[Math.floor(i / T)]!)} has no value for ${y0 + (i % T)} (${missingSY.length} series-years missing); a stock-driven model needs every year`);
  }

  // Initial stock.
  let initByAge: Float64Array | null = null;
  let initTotal: Float64Array | null = null;
  let A = 0;
  if (o.initial_stock) {
    const icols = await ctx.columnsOf(o.initial_stock);
    const need = [...o.keys, "value"].filter((c) => !icols.includes(c));
    if (need.length) throw new DataError(`step ${o.id}: initial_stock table ${o.initial_stock} lacks column(s) ${need.join(", ")}`);
    const orphan = await s.all(`SELECT ${K} FROM ${ident(o.initial_stock)} EXCEPT SELECT ${K} FROM ${ident(`__${o.id}_sid`)} LIMIT 1`);
    if (orphan.length) throw new DataError(`step ${o.id}: initial_stock has a row for series ${JSON.stringify(orphan[0])} that is not in the input ${o.input}`);
    if (icols.includes("age")) {
      const bad = await s.all(`SELECT ${K}, age FROM ${ident(o.initial_stock)} WHERE age IS NULL OR age < 0 OR age <> round(age) LIMIT 1`);
      if (bad.length) throw new DataError(`step ${o.id}: initial_stock age must be a whole number ≥ 0 (got ${JSON.stringify(bad[0])})`);
      A = Number(await s.scalar(`SELECT max(age) + 1 FROM ${ident(o.initial_stock)}`));
      const { rows, columns } = await readColumns(s, `SELECT m.sid, CAST(i.age AS INTEGER), CAST(i.value AS DOUBLE) FROM ${ident(o.initial_stock)} i JOIN ${ident(`__${o.id}_sid`)} m USING (${K})`, ["i32", "i32", "f64"]);
      initByAge = new Float64Array(n * A);
      for (let r = 0; r < rows; r++) initByAge[(columns[0] as Int32Array)[r]! * A + (columns[1] as Int32Array)[r]!] += (columns[2] as Float64Array)[r]!;
    } else {
      const { rows, columns } = await readColumns(s, `SELECT m.sid, CAST(sum(i.value) AS DOUBLE) FROM ${ident(o.initial_stock)} i JOIN ${ident(`__${o.id}_sid`)} m USING (${K}) GROUP BY m.sid`, ["i32", "f64"]);
      initTotal = new Float64Array(n);
      for (let r = 0; r < rows; r++) initTotal[(columns[0] as Int32Array)[r]!] = (columns[1] as Float64Array)[r]!;
    }
  }

  // Lifetimes: rows, matching per series and cohort, curves computed once per row.
  const lt = await paramRows(s, o.lifetimes, o, LIFETIME_COLS, "lifetimes");
  if (!(await ctx.columnsOf(o.lifetimes)).includes("distribution")) throw new DataError(`step ${o.id}: lifetimes table ${o.lifetimes} has no distribution column (accepted: ${DISTRIBUTION_NAMES.join(", ")})`);
  const curveTable = new Map<string, { ages: number[]; survival: number[] }>();
  if (o.curves) {
    const cc = await ctx.columnsOf(o.curves);
    for (const c of ["curve", "age", "survival"]) if (!cc.includes(c)) throw new DataError(`step ${o.id}: curves table ${o.curves} lacks column ${c}`);
    for (const r of await s.all(`SELECT CAST(curve AS VARCHAR) AS curve, age, survival FROM ${ident(o.curves)} ORDER BY curve, age`)) {
      const e = curveTable.get(String(r.curve)) ?? { ages: [], survival: [] };
      e.ages.push(Number(r.age));
      e.survival.push(Number(r.survival));
      curveTable.set(String(r.curve), e);
    }
  }
  const hasInit = Boolean(o.initial_stock);
  const rowCurves = new Map<number, Curve>();
  let curveLen = T + (A || 0) + 1;
  const curveFor = (row: LifetimeRow, where: string): Curve => {
    let c = rowCurves.get(row.index);
    if (!c) {
      const r = row.raw;
      const num = (x: unknown) => (x === null || x === undefined || x === "" ? null : Number(x));
      let ltm;
      try {
        ltm = makeLifetime({
        distribution: String(r.distribution ?? ""), mean: num(r.mean), sd: num(r.sd), shape: num(r.shape), scale: num(r.scale),
        curve: r.curve === null || r.curve === undefined || r.curve === "" ? null : String(r.curve),
        }, `${where}: lifetimes row ${row.index + 1}`, (name) => curveTable.get(name));
      } catch (e) {
        throw new DataError(`step ${o.id}: ${(e as Error).message}`);
      }
      c = curveOf(ltm, curveLen);
      rowCurves.set(row.index, c);
    }
    return c;
  };
  // Steady-state initial stock: ages up to where σ of the lifetime at cohort y0 − 1 is negligible.
  if (hasInit && !initByAge) {
    let maxA = 1;
    for (let sidx = 0; sidx < n; sidx++) {
      if (!initTotal![sidx]) continue;
      const cand = candidates(lt.rows, lt.keyCols, projectKeys(o.keys, lt.keyCols, ser.keyValues[sidx]!));
      const p = pick(cand, y0 - 1);
      if (typeof p === "string") throw new DataError(`step ${o.id}: series ${describeSeries(o.keys, ser.keyValues[sidx]!)}, cohort ${y0 - 1} (initial stock): ${p} in ${o.lifetimes}`);
      const tmp = curveFor(p as LifetimeRow, `series ${describeSeries(o.keys, ser.keyValues[sidx]!)}`);
      maxA = Math.max(maxA, ageHorizon(tmp.lifetime, 1e-12, 1000));
    }
    A = maxA;
    // Curves must reach A + T ages.
    if (A + T + 1 > curveLen) {
      curveLen = A + T + 1;
      rowCurves.clear();
    }
  }

  // Groups: series with the same candidate rows share one survival matrix.
  const groups = new Map<string, { sids: number[]; curves: Curve[]; initCurves: Curve[] }>();
  for (let sidx = 0; sidx < n; sidx++) {
    const vals = ser.keyValues[sidx]!;
    const cand = candidates(lt.rows, lt.keyCols, projectKeys(o.keys, lt.keyCols, vals));
    const needInit = hasInit && ((initTotal && initTotal[sidx]) || (initByAge && initByAge.subarray(sidx * A, sidx * A + A).some((x) => x !== 0)));
    const key = cand.map((c) => c.index).join(",") + (needInit ? "|i" : "");
    let g = groups.get(key);
    if (!g) {
      const where = `series ${describeSeries(o.keys, vals)}`;
      const curves: Curve[] = [];
      for (let c = 0; c < T; c++) {
        const p = pick(cand, y0 + c);
        if (typeof p === "string") throw new DataError(`step ${o.id}: ${where}, cohort ${y0 + c}: ${p} in lifetimes table ${o.lifetimes}`);
        curves.push(curveFor(p as LifetimeRow, where));
      }
      const initCurves: Curve[] = [];
      if (needInit) {
        for (let age = 0; age < A; age++) {
          const p = pick(cand, y0 - 1 - age);
          if (typeof p === "string") throw new DataError(`step ${o.id}: ${where}, cohort ${y0 - 1 - age} (initial stock, age ${age}): ${p} in lifetimes table ${o.lifetimes}`);
          initCurves.push(curveFor(p as LifetimeRow, where));
        }
      }
      g = { sids: [], curves, initCurves };
      groups.set(key, g);
    }
    g.sids.push(sidx);
  }

  // Content (composition by cohort).
  let materials: string[] = [];
  let contentRows: { rows: LifetimeRow[]; keyCols: string[] } | null = null;
  if (o.content) {
    contentRows = await paramRows(s, o.content, o, ["material", "first_cohort", "last_cohort", "content"], "content");
    const cc = await ctx.columnsOf(o.content);
    for (const c of ["material", "content"]) if (!cc.includes(c)) throw new DataError(`step ${o.id}: content table ${o.content} lacks column ${c}`);
    materials = [...new Set(contentRows.rows.map((r) => String(r.raw.material)))].sort();
    for (const r of contentRows.rows) {
      const v = Number(r.raw.content);
      if (!Number.isFinite(v) || v < 0) throw new DataError(`step ${o.id}: content table ${o.content}, row ${r.index + 1}: content must be a finite number ≥ 0 (got ${r.raw.content})`);
    }
  }
  const M = materials.length;

  // Run per group.
  const out = {
    inflow: new Float64Array(n * T), outflow: new Float64Array(n * T), stock: new Float64Array(n * T), stockChange: new Float64Array(n * T),
    meanAgeStock: new Float64Array(n * T).fill(NaN), meanAgeOutflow: new Float64Array(n * T).fill(NaN),
    unmet: o.mode === "stock-driven" && o.negative_inflow === "clamp" ? new Float64Array(n * T) : null,
    tooOld: new Float64Array(n),
  };
  const mat = M ? { inflow: new Float64Array(n * M * T), outflow: new Float64Array(n * M * T), stock: new Float64Array(n * M * T), sumCheck: new Float64Array(n * T) } : null;
  const hasContent = new Uint8Array(n);
  const tick = ctx.progress.counter(`step ${o.id}: series`, n);
  let done = 0;
  const byCohortName = `${o.id}_by_cohort`;
  const bcw = o.by_cohort
    ? new ByCohortWriter(s, byCohortName, path.join(ctx.outputDir, `.${byCohortName}.parts`), ctx.outputDir, o.keys.map((k) => `m.${ident(k)}`).join(", "), `__${o.id}_sid`, y0, unit, T, n)
    : null;
  // Prepare every group, then run the models: on the worker pool when the work is large.
  const prepared = [...groups.values()].map((g) => {
    const group = new CohortGroup(T, g.curves);
    const gn = g.sids.length;
    const gather = (src: Float64Array, width: number) => {
      const x = new Float64Array(gn * width);
      g.sids.forEach((sid, j) => x.set(src.subarray(sid * width, sid * width + width), j * width));
      return x;
    };
    let init: InitialContribution | null = null;
    let initSpec: InitialStock | null = null;
    if (g.initCurves.length) {
      initSpec = { byAge: initByAge ? gather(initByAge, A) : null, total: initTotal ? gatherVec(initTotal, g.sids) : new Float64Array(gn), A, curves: g.initCurves };
      init = initialContribution(initSpec, gn, T);
    }
    if (o.mode === "stock-driven") {
      for (let c = 0; c < T; c++) {
        if (!(group.S[c * T + c]! > 0)) throw new DataError(`step ${o.id}: series ${describeSeries(o.keys, ser.keyValues[g.sids[0]!]!)}, cohort ${y0 + c}: σ(0) = 0 (everything leaves in the year of entry), so no inflow can build a stock`);
      }
    }
    return { g, group, gn, init, initSpec, v: gather(value, T) };
  });
  const cells = n * T * (T + 1) / 2;
  const usePool = cells >= POOL_MIN_CELLS && CohortPool.shared().size > 1;
  const modelOf = (x: (typeof prepared)[number]): ModelResult =>
    o.mode === "inflow-driven"
      ? inflowDriven(x.group, x.v, x.gn, { indicators: o.indicators, initial: x.init })
      : stockDriven(x.group, x.v, x.gn, { indicators: o.indicators, initial: x.init, clamp: o.negative_inflow === "clamp" });
  const results: ModelResult[] = usePool
    ? await runTasks(prepared.map((x) => taskFor(o.mode === "inflow-driven" ? "inflow" : "stock", x.group, x.v, x.gn,
        { indicators: o.indicators, initial: x.init, clamp: o.negative_inflow === "clamp" })))
    : [];
  if (usePool) ctx.progress.info(`step ${o.id}: ${prepared.length} lifetime groups on ${CohortPool.shared().size} worker threads`);
  for (const [gi, x] of prepared.entries()) {
    const { g, group, gn } = x;
    const scatter = (dst: Float64Array, src: Float64Array, width: number) => {
      g.sids.forEach((sid, j) => dst.set(src.subarray(j * width, j * width + width), sid * width));
    };
    const r: ModelResult = usePool ? results[gi]! : modelOf(x);
    scatter(out.inflow, r.inflow, T);
    scatter(out.outflow, r.outflow, T);
    scatter(out.stock, r.stock, T);
    scatter(out.stockChange, r.stockChange, T);
    if (r.meanAgeStock) scatter(out.meanAgeStock, r.meanAgeStock, T);
    if (r.meanAgeOutflow) scatter(out.meanAgeOutflow, r.meanAgeOutflow, T);
    if (r.unmet && out.unmet) scatter(out.unmet, r.unmet, T);
    if (r.initialTooOld) g.sids.forEach((sid, j) => (out.tooOld[sid] = r.initialTooOld![j]!));

    if (mat && contentRows) {
      // Content by series, material and cohort.
      const content = new Float64Array(gn * M * T);
      const total = new Float64Array(gn * T);
      g.sids.forEach((sid, j) => {
        const vals = ser.keyValues[sid]!;
        const cand = candidates(contentRows!.rows, contentRows!.keyCols, projectKeys(o.keys, contentRows!.keyCols, vals));
        if (cand.length === 0) return;
        hasContent[sid] = 1;
        materials.forEach((m, mi) => {
          const cm = cand.filter((c) => String(c.raw.material) === m);
          for (let c = 0; c < T; c++) {
            const p = pick(cm, y0 + c);
            if (typeof p === "string") {
              if (cm.length === 0) continue; // this series holds none of material m
              throw new DataError(`step ${o.id}: series ${describeSeries(o.keys, vals)}, material ${m}, cohort ${y0 + c}: ${p} in content table ${o.content}`);
            }
            const x = Number(p.raw.content);
            content[(j * M + mi) * T + c] = x;
            total[j * T + c] += x;
          }
        });
      });
      // The initial stock carries no material content (documented): only model cohorts are composed.
      const rm = composition(group, r.inflow, gn, content, M, null);
      const rsum = composition(group, r.inflow, gn, total, 1, null);
      g.sids.forEach((sid, j) => {
        for (let mi = 0; mi < M; mi++) {
          const from = (j * M + mi) * T;
          const to = (sid * M + mi) * T;
          mat.inflow.set(rm.inflow.subarray(from, from + T), to);
          mat.outflow.set(rm.outflow.subarray(from, from + T), to);
          mat.stock.set(rm.stock.subarray(from, from + T), to);
        }
        mat.sumCheck.set(rsum.stock.subarray(j * T, j * T + T), sid * T);
      });
    }
    if (bcw) {
      // The initial stock's cohorts (entered before the first model year), then the model cohorts.
      if (x.initSpec) for (const chunk of initialCohorts(x.initSpec, gn, T)) {
        await bcw.add(g.sids[chunk.s]!, chunk.cohort, chunk.year, chunk.inflow, chunk.outflow, chunk.stock);
      }
      for (const chunk of byCohort(group, r.inflow, gn)) {
        await bcw.add(g.sids[chunk.s]!, chunk.cohort, chunk.year, chunk.inflow, chunk.outflow, chunk.stock);
        tick(done + chunk.s + 1);
      }
    }
    if (usePool) recycle(r); // the arena keeps the memory for the next group
    done += gn;
    tick(done);
  }

  // Results back to DuckDB as typed arrays.
  const sidCol = new Int32Array(n * T);
  const yiCol = new Int32Array(n * T);
  for (let sidx = 0; sidx < n; sidx++) for (let t = 0; t < T; t++) {
    sidCol[sidx * T + t] = sidx;
    yiCol[sidx * T + t] = t;
  }
  const cols: OutColumn[] = [
    { name: "sid", kind: "i32", data: sidCol }, { name: "yi", kind: "i32", data: yiCol },
    { name: "inflow", kind: "f64", data: out.inflow }, { name: "outflow", kind: "f64", data: out.outflow },
    { name: "stock", kind: "f64", data: out.stock }, { name: "stock_change", kind: "f64", data: out.stockChange },
    { name: "mean_age_stock", kind: "f64", data: out.meanAgeStock }, { name: "mean_age_outflow", kind: "f64", data: out.meanAgeOutflow },
    { name: "given", kind: "f64", data: value },
    ...(out.unmet ? [{ name: "unmet_stock_change", kind: "f64" as const, data: out.unmet }] : []),
  ];
  const raw = `__${o.id}_raw`;
  await writeColumns(s, raw, cols, n * T, { keepOrder: false }); // read back with ORDER BY
  const sidT = ident(`__${o.id}_sid`);
  const nanToNull = (c: string) => `CASE WHEN isnan(r.${c}) THEN NULL ELSE r.${c} END AS ${c}`;
  const extra = o.mode === "stock-driven"
    ? `, r.given AS stock_target${out.unmet ? ", r.unmet_stock_change" : ""}, r.inflow < 0 AS negative_inflow`
    : "";
  await s.run(`CREATE OR REPLACE TABLE ${ident(o.id)} AS
    SELECT ${o.keys.map((k) => `m.${ident(k)}`).join(", ")}, CAST(r.yi + ${y0} AS INTEGER) AS year, r.inflow, r.outflow, r.stock, r.stock_change, ${lit(unit)} AS unit
      ${o.indicators ? `, ${nanToNull("mean_age_stock")}, ${nanToNull("mean_age_outflow")}` : ""}${extra}
    FROM ${ident(raw)} r JOIN ${sidT} m USING (sid) ORDER BY ${o.keys.map((k) => `m.${ident(k)}`).join(", ")}, year`);
  const produced: { name: string; keys: string[]; files?: OutputFile[] }[] = [{ name: o.id, keys: [...o.keys, "year"] }];

  // Audits.
  const tol = (cols: string) => `${a.balance_rtol} * greatest(${cols}) + ${a.balance_atol}`;
  const balanceCheck = async (table: string, keys: string[], check: string) => {
    await ctx.audits.check({
      step: o.id, check, severity: "error",
      items: `SELECT ${keyMap(keys)} AS keys, year, stock - coalesce(lag(stock) OVER w, ${hasInit ? "stock - stock_change" : "0"}) AS observed, inflow - outflow AS expected,
        ${tol("abs(stock), abs(inflow), abs(outflow)")} AS tolerance, NULL AS message
        FROM ${ident(table)} WINDOW w AS (PARTITION BY ${idents(keys)} ORDER BY year)`,
      failMessage: "stock change ≠ inflow − outflow",
    });
  };
  await balanceCheck(o.id, o.keys, "balance");
  await ctx.audits.check({
    step: o.id, check: "stock-sign", severity: "error",
    items: `SELECT ${keyMap(o.keys)} AS keys, year, stock AS observed, 0.0 AS expected, ${a.balance_atol} AS tolerance,
      'negative stock ' || stock AS message FROM ${ident(o.id)}`,
    failWhen: "observed < -tolerance",
    failMessage: "negative stock",
  });
  if (o.mode === "inflow-driven") {
    await ctx.audits.check({
      step: o.id, check: "negative-inflow", severity: a.negative_severity,
      items: `SELECT ${keyMap(o.keys)} AS keys, year, inflow AS observed, 0.0 AS expected, 0.0 AS tolerance, 'negative inflow ' || inflow || ' (e.g. negative apparent consumption) enters the stock as given' AS message FROM ${ident(o.id)}`,
      failWhen: "observed < 0", failMessage: "negative inflow",
    });
    if (missingSY.length) {
      await ctx.audits.check({
        step: o.id, check: "coverage", severity: "warning",
        items: `SELECT ${keyMap(o.keys, "m")} AS keys, y AS year, 0.0 AS observed, NULL AS expected, 0.0 AS tolerance, 'no inflow row for this series-year; taken as 0' AS message
          FROM ${sidT} m CROSS JOIN range(${y0}, ${y1 + 1}) r(y) ANTI JOIN ${ident(o.input)} i ON ${o.keys.map((k) => `i.${ident(k)} = m.${ident(k)}`).join(" AND ")} AND i.year = r.y`,
        failWhen: "TRUE", failMessage: "missing series-year",
      });
    }
  } else {
    await ctx.audits.check(o.negative_inflow === "clamp"
      ? {
          step: o.id, check: "negative-inflow", severity: a.negative_severity,
          items: `SELECT ${keyMap(o.keys)} AS keys, year, unmet_stock_change AS observed, 0.0 AS expected, ${a.balance_atol} AS tolerance,
            'inflow clamped to 0: the stock stays ' || (-unmet_stock_change) || ' above its path (unmet stock change ' || unmet_stock_change || ')' AS message FROM ${ident(o.id)}`,
          failMessage: "negative inflow clamped",
        }
      : {
          step: o.id, check: "negative-inflow", severity: a.negative_severity,
          items: `SELECT ${keyMap(o.keys)} AS keys, year, inflow AS observed, 0.0 AS expected, 0.0 AS tolerance,
            'negative inflow ' || inflow || ' needed to follow the falling stock path (kept; negative_inflow = true)' AS message FROM ${ident(o.id)}`,
          failWhen: "observed < 0",
          failMessage: "negative inflow",
        });
    if (!hasInit) {
      await ctx.audits.check({
        step: o.id, check: "first-year-spike", severity: "warning",
        items: `SELECT ${keyMap(o.keys)} AS keys, year, stock_target AS observed, 0.0 AS expected, 0.0 AS tolerance,
          'the stock path starts at ' || stock_target || ' with no initial_stock: the whole stock enters as first-year inflow (a spike); give initial_stock' AS message
          FROM ${ident(o.id)} WHERE year = ${y0}`,
        failWhen: "observed > 0", failMessage: "first-year inflow spike",
      });
    }
    await ctx.audits.check({
      step: o.id, check: "stock-path", severity: o.negative_inflow === "clamp" ? "warning" : "error",
      items: `SELECT ${keyMap(o.keys)} AS keys, year, stock AS observed, stock_target AS expected, ${tol("abs(stock_target), abs(inflow), abs(outflow)")} AS tolerance, NULL AS message FROM ${ident(o.id)}`,
      failMessage: "achieved stock differs from the stock path",
    });
  }
  if (hasInit) {
    const old: string[] = [];
    for (let sidx = 0; sidx < n; sidx++) if (out.tooOld[sidx]! > 0) old.push(`${describeSeries(o.keys, ser.keyValues[sidx]!)} (${out.tooOld[sidx]})`);
    if (old.length) await ctx.audits.note(o.id, "initial-stock-age", "warning", "fail", `initial stock older than its lifetime distribution allows leaves in ${y0}: ${old.slice(0, 10).join("; ")}${old.length > 10 ? ` and ${old.length - 10} more series` : ""}`, old.length, 0);
  }

  // Lifetimes used: leaving share and survival by age (response to a unit pulse).
  const ltRows: number[] = [];
  const ltAge: number[] = [];
  const ltSigma: number[] = [];
  const ltLeave: number[] = [];
  const used = [...rowCurves.entries()].sort((x, y) => x[0] - y[0]);
  const ages = Math.min(curveLen, T + A);
  for (const [idx, c] of used) for (let age = 0; age < ages; age++) {
    ltRows.push(idx);
    ltAge.push(age);
    ltSigma.push(c.sigma[age]!);
    ltLeave.push(c.leave[age]!);
  }
  const ltRaw = `__${o.id}_ltraw`;
  await writeColumns(s, ltRaw, [
    { name: "row", kind: "i32", data: Int32Array.from(ltRows) }, { name: "age", kind: "i32", data: Int32Array.from(ltAge) },
    { name: "leaving_share", kind: "f64", data: Float64Array.from(ltLeave) }, { name: "survival", kind: "f64", data: Float64Array.from(ltSigma) },
  ], ltRows.length);
  const ltInfo = await s.all(`SELECT * FROM ${ident(o.lifetimes)}`);
  const ltMeta = `__${o.id}_ltmeta`;
  await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(ltMeta)} (row INTEGER, lifetime_row INTEGER, ${lt.keyCols.map((k) => `${ident(k)} VARCHAR`).join(", ")}${lt.keyCols.length ? "," : ""}
    first_cohort INTEGER, last_cohort INTEGER, distribution VARCHAR, mean DOUBLE, sd DOUBLE, shape DOUBLE, scale DOUBLE, curve VARCHAR, true_mean DOUBLE, below_zero DOUBLE)`);
  for (const [idx, c] of used) {
    const r = ltInfo[idx]!;
    const v = (x: unknown) => (x === null || x === undefined || x === "" ? "NULL" : lit(Number(x)));
    await s.run(`INSERT INTO ${ident(ltMeta)} VALUES (${idx}, ${idx + 1}, ${lt.keyCols.map((k) => (r[k] === null || r[k] === undefined || r[k] === "" ? "NULL" : lit(String(r[k])))).join(", ")}${lt.keyCols.length ? "," : ""}
      ${v(r.first_cohort)}, ${v(r.last_cohort)}, ${lit(String(r.distribution))}, ${v(r.mean)}, ${v(r.sd)}, ${v(r.shape)}, ${v(r.scale)}, ${r.curve ? lit(String(r.curve)) : "NULL"},
      ${Number.isFinite(c.lifetime.mean) ? lit(c.lifetime.mean) : "NULL"}, ${lit(c.lifetime.belowZero)})`);
  }
  await s.run(`CREATE OR REPLACE TABLE ${ident(`${o.id}_lifetimes`)} AS
    SELECT m.* EXCLUDE (row), l.age, l.leaving_share, l.survival FROM ${ident(ltRaw)} l JOIN ${ident(ltMeta)} m USING (row) ORDER BY m.lifetime_row, l.age`);
  produced.push({ name: `${o.id}_lifetimes`, keys: ["lifetime_row", "age"] });
  await ctx.audits.check({
    step: o.id, check: "lifetime-below-zero", severity: a.lifetime_severity,
    items: `SELECT MAP(['lifetime_row'], [CAST(lifetime_row AS VARCHAR)]) AS keys, NULL AS year, below_zero AS observed, 0.0 AS expected, ${a.below_zero_threshold} AS tolerance,
      'lifetime row ' || lifetime_row || ' (' || distribution || '): ' || round(100 * below_zero, 3) || ' % of each cohort falls below age 0 and leaves in its year of entry' AS message
      FROM ${ident(ltMeta)}`,
    failMessage: "mass below age 0",
  });
  await ctx.audits.check({
    step: o.id, check: "lifetime-beyond-horizon", severity: a.lifetime_severity,
    items: `SELECT MAP(['lifetime_row'], [CAST(lifetime_row AS VARCHAR)]) AS keys, NULL AS year, survival AS observed, 0.0 AS expected, ${a.beyond_horizon_threshold} AS tolerance,
      'lifetime row ' || lifetime_row || ': ' || round(100 * survival, 2) || ' % of a cohort entering in ${y0} is still in stock at the end of ${y1}; its outflow falls beyond the horizon' AS message
      FROM ${ident(`${o.id}_lifetimes`)} WHERE age = ${T - 1}`,
    failMessage: "mass beyond the horizon",
  });

  // Materials.
  if (mat && M) {
    const rows = n * M * T;
    const sidM = new Int32Array(rows);
    const mi = new Int32Array(rows);
    const yi = new Int32Array(rows);
    let k = 0;
    for (let sidx = 0; sidx < n; sidx++) for (let m = 0; m < M; m++) for (let t = 0; t < T; t++) {
      sidM[k] = sidx; mi[k] = m; yi[k++] = t;
    }
    const matRaw = `__${o.id}_matraw`;
    await writeColumns(s, matRaw, [
      { name: "sid", kind: "i32", data: sidM }, { name: "mi", kind: "i32", data: mi }, { name: "yi", kind: "i32", data: yi },
      { name: "inflow", kind: "f64", data: mat.inflow }, { name: "outflow", kind: "f64", data: mat.outflow }, { name: "stock", kind: "f64", data: mat.stock },
    ], rows);
    const matNames = `__${o.id}_matnames`;
    await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(matNames)} AS SELECT CAST(i - 1 AS INTEGER) AS mi, m AS material FROM (SELECT unnest([${materials.map(lit).join(", ")}]) AS m, generate_subscripts([${materials.map(lit).join(", ")}], 1) AS i)`);
    const withContent = `__${o.id}_hascontent`;
    await writeColumns(s, withContent, [{ name: "sid", kind: "i32", data: Int32Array.from([...hasContent.keys()].filter((i) => hasContent[i])) }], [...hasContent].filter(Boolean).length);
    const matUnit = unit === "piece" ? ctx.pipeline.base_unit : unit;
    await s.run(`CREATE OR REPLACE TABLE ${ident(`${o.id}_materials`)} AS
      SELECT ${o.keys.map((k) => `m.${ident(k)}`).join(", ")}, n.material, CAST(r.yi + ${y0} AS INTEGER) AS year, r.inflow, r.outflow, r.stock,
        r.stock - coalesce(lag(r.stock) OVER (PARTITION BY r.sid, r.mi ORDER BY r.yi), 0) AS stock_change, ${lit(matUnit)} AS unit
      FROM ${ident(matRaw)} r JOIN ${sidT} m USING (sid) JOIN ${ident(matNames)} n USING (mi) SEMI JOIN ${ident(withContent)} h USING (sid)
      ORDER BY ${o.keys.map((k) => `m.${ident(k)}`).join(", ")}, n.material, year`);
    produced.push({ name: `${o.id}_materials`, keys: [...o.keys, "material", "year"] });
    await balanceCheck(`${o.id}_materials`, [...o.keys, "material"], "materials-balance");
    // Σ over materials = the model run once with the summed content (linearity of the model).
    const sumRaw = `__${o.id}_sumraw`;
    await writeColumns(s, sumRaw, [{ name: "sid", kind: "i32", data: sidCol }, { name: "yi", kind: "i32", data: yiCol }, { name: "stock", kind: "f64", data: mat.sumCheck }], n * T);
    await ctx.audits.check({
      step: o.id, check: "materials-total", severity: "error",
      items: `WITH t AS (SELECT sid, yi, sum(stock) AS st, max(abs(stock)) AS mx FROM ${ident(matRaw)} GROUP BY sid, yi)
        SELECT ${keyMap(o.keys, "m")} AS keys, t.yi + ${y0} AS year, t.st AS observed, c.stock AS expected, ${a.balance_rtol} * greatest(abs(c.stock), t.mx) + ${a.balance_atol} AS tolerance,
          'sum of material stocks ≠ stock computed with the total content' AS message
        FROM t JOIN ${ident(sumRaw)} c USING (sid, yi) JOIN ${sidT} m USING (sid) SEMI JOIN ${ident(withContent)} h USING (sid)`,
      failMessage: "material totals differ",
    });
    const noContent = n - [...hasContent].filter(Boolean).length;
    if (noContent > 0) await ctx.audits.note(o.id, "materials-coverage", "warning", "fail", `${noContent} series have no row in the content table and are not in ${o.id}_materials`, noContent, 0);
    for (const t of [matRaw, matNames, withContent, sumRaw]) await s.run(`DROP TABLE IF EXISTS ${ident(t)}`);
  }

  if (bcw) {
    const files = await bcw.finish();
    produced.push({ name: byCohortName, keys: [...o.keys, "cohort", "year"], files });
    const sums = `__${o.id}_bcsums`;
    await writeColumns(s, sums, [{ name: "sid", kind: "i32", data: sidCol }, { name: "yi", kind: "i32", data: yiCol },
      { name: "st", kind: "f64", data: bcw.sumStock }, { name: "ou", kind: "f64", data: bcw.sumOutflow }], n * T);
    await ctx.audits.check({
      step: o.id, check: "by-cohort-total", severity: "error",
      items: `SELECT ${keyMap(o.keys, "m")} AS keys, r.yi + ${y0} AS year, c.st + c.ou AS observed, r.stock + r.outflow AS expected,
          ${a.balance_rtol} * greatest(abs(r.stock), abs(r.outflow)) + ${a.balance_atol} AS tolerance,
          'cohort-resolved stock and outflow do not add up to the totals' AS message
        FROM ${ident(raw)} r JOIN ${ident(sums)} c USING (sid, yi) JOIN ${sidT} m USING (sid)`,
      failMessage: "cohort-resolved totals differ",
    });
    await s.run(`DROP TABLE ${ident(sums)}`);
  }
  for (const t of [raw, ltRaw, ltMeta]) await s.run(`DROP TABLE IF EXISTS ${ident(t)}`);
  return produced;
}

function projectKeys(all: readonly string[], sub: readonly string[], values: readonly string[]): string[] {
  // candidates() looks values up by the position of a key in `keyCols`; give it those.
  return sub.map((k) => values[all.indexOf(k)]!);
}

function gatherVec(src: Float64Array, sids: readonly number[]): Float64Array {
  const x = new Float64Array(sids.length);
  sids.forEach((s, j) => (x[j] = src[s]!));
  return x;
}
