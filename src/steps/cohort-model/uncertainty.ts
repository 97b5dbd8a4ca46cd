/**
 * Monte Carlo uncertainty of a cohort model (`uncertainty:`): the job built from the step's
 * own inputs, lifetime groups and content (src/uncertainty/ computes it), then the published
 * tables `<id>_uncertainty` (mean, sd and quantiles per series, year and variable, and per
 * total, with the deterministic run's value as `central`) and `<id>_sensitivity` (Sobol
 * indices), and the audit that totals come from per-draw sums.
 *
 * Draw tables: each uncertain assumption has its own table of draws, sampled by the design
 * (random or Latin hypercube) with jstat's samplers under the seeded generator. Lifetime
 * parameters: one value per lifetimes row and draw (the series of a row share it). Content:
 * one factor per material and draw. Input: one error per series (and year, by the
 * correlation) and draw, from a stream of its own. The stock in place of a continued model
 * keeps its central survival (its cohorts' amounts and lifetimes come from the earlier step's
 * deterministic run); the stock in place given by age takes each draw's lifetimes.
 */
import { DataError } from "../../errors.js";
import { ident, lit } from "../../engine/sql.js";
import { writeColumns } from "../../engine/handoff.js";
import { initialContribution, type Curve } from "../../cohort/index.js";
import { Rng } from "../../uncertainty/random.js";
import { sampleInputs } from "../../uncertainty/designs.js";
import { factorMarginal, parseSpread, resolveSpread, type Spread } from "../../uncertainty/spreads.js";
import type { Marginal } from "../../uncertainty/marginals.js";
import { runMonteCarlo, type McOutcome } from "../../uncertainty/mc.js";
import { DrawError } from "../../uncertainty/mc-chunk.js";
import { LT_PARAMS, type McGroup, type McJob } from "../../uncertainty/mc-types.js";
import type { ColumnDecl, OutputDecl, PlanContext, StepContext } from "../types.js";
import { keyFrom, mass, share, text, years } from "../columns.js";
import { amountsOf, type Results } from "./compute.js";
import { groupContent } from "./content.js";
import type { Group } from "./groups.js";
import { sidTable, type Inputs } from "./inputs.js";
import type { O } from "./options.js";
import type { CurveTable, ParamRow } from "./params.js";
import { quantileColumn, type UncertaintyT } from "./uncertainty-options.js";

const ASSUMPTIONS = ["lifetimes", "content", "input"] as const;

/** The assumptions a step declares uncertain, in a fixed order. */
function declared(u: UncertaintyT, hasRowSpreads: boolean): (typeof ASSUMPTIONS)[number][] {
  return ASSUMPTIONS.filter((a) => (a === "lifetimes" ? Boolean(u.lifetimes && Object.values(u.lifetimes).some(Boolean)) || hasRowSpreads : Boolean(u[a])));
}

export function declareUncertainty(ctx: PlanContext, o: O): OutputDecl[] {
  const u = o.uncertainty;
  if (!u) return [];
  const input = ctx.schemaOf(o.input, "input");
  for (const [i, level] of u.totals.entries()) {
    const bad = level.filter((k) => !o.keys.includes(k));
    if (bad.length) ctx.fail("uncertainty", `totals[${i}]: ${bad.join(", ")} is not a key of this model (keys: ${o.keys.join(", ")})`);
  }
  if (u.content && !o.content) ctx.fail("uncertainty", "content: a content spread needs the step's content table (content:)");
  for (const [what, sp] of [["content", u.content], ["input.spread", u.input?.spread]] as const) {
    if (sp) try {
      factorMarginal(sp as Spread, `uncertainty.${what}`);
    } catch (e) {
      ctx.fail("uncertainty", (e as Error).message);
    }
  }
  const lt = ctx.schemaOf(o.lifetimes, "lifetimes").columns.map((c) => c.name);
  const rowSpreads = lt.some((c) => c.endsWith("_rel_sd"));
  const k = declared(u, rowSpreads);
  if (!k.length) ctx.fail("uncertainty", "no uncertain assumption: give lifetimes, content or input (or <param>_rel_sd columns in the lifetimes table)");
  const keys = o.keys.map((kk) => ({ ...keyFrom(input, kk), description: `${keyFrom(input, kk).description} (empty in a total over it)` }));
  const q = u.quantiles.map((p): ColumnDecl => mass(quantileColumn(p), `quantile ${p} of the draws (Hyndman & Fan 1996, definition 7)`));
  const common: ColumnDecl[] = [...keys, text("total_over", "the keys summed over in a total (e.g. region, product), empty for a series"),
    text("material", "material (empty: the product itself)"), text("variable", "inflow, outflow or stock"),
    { name: "year", type: "BIGINT", unit: "year", description: "calendar year" }];
  const out: OutputDecl[] = [{
    name: `${o.id}_uncertainty`, role: "detail",
    description: `Monte Carlo ranges of ${o.id}: ${u.draws} draws (seed ${u.seed}, ${u.sampling} sampling) over ${k.join(", ")}; totals from per-draw sums`,
    keys: [...o.keys, "total_over", "material", "variable", "year"],
    columns: [...common, mass("central", "the deterministic run's value (the published figure)"), mass("mean", "mean of the draws"),
      mass("sd", "standard deviation of the draws (n − 1)"), ...q, text("unit", "unit of the value columns")],
  }];
  if (u.sensitivity) {
    out.push({
      name: `${o.id}_sensitivity`, role: "detail",
      description: `variance-based sensitivity of ${o.id}'s stock and outflow to ${k.join(", ")}: Saltelli (2010) first-order and Jansen total-effect indices, N = ${u.sensitivity.base} (${u.sensitivity.base * (k.length + 2)} runs), bootstrap ${u.sensitivity.confidence} intervals (${u.sensitivity.resamples} resamples)`,
      keys: [...o.keys, "total_over", "variable", "year", "assumption"],
      columns: [...common.filter((c) => c.name !== "material"), text("assumption", "the uncertain assumption: lifetimes, content or input"),
        share("first_order", "first-order index S: share of the variance due to this assumption alone"),
        share("total_effect", "total-effect index ST: share of the variance involving this assumption"),
        share("first_order_low", "lower bound of the bootstrap interval of S"), share("first_order_high", "upper bound of the bootstrap interval of S"),
        share("total_effect_low", "lower bound of the bootstrap interval of ST"), share("total_effect_high", "upper bound of the bootstrap interval of ST"),
        { name: "base_samples", type: "INTEGER", unit: "count", description: "N, the estimator's base sample size" },
        share("confidence", "confidence level of the intervals")],
    });
  }
  return out;
}

/** The curve → lifetimes row map of the rows used (CurveCache.used()). */
type RowOf = (c: Curve) => number;

interface Built {
  job: McJob;
  assumptions: (typeof ASSUMPTIONS)[number][];
  /** Totals: for each cell, what it sums over (total_over) and its key values (null where summed over). */
  cells: { over: string; values: (string | null)[] }[];
}

function rowSpread(raw: Record<string, unknown>, p: string): Spread | null {
  const v = raw[`${p}_rel_sd`];
  if (v === null || v === undefined || v === "") return null;
  return parseSpread({ family: "normal", rel_sd: Number(v), truncate_below: 0 }, `lifetimes column ${p}_rel_sd`);
}

/** Draw tables: lifetime parameters (rows × 4 × D) and content factors (M × D), sampled by the design. */
function drawTables(o: O, u: UncertaintyT, ltRows: ParamRow[], usedRows: number[], M: number, D: number, rng: Rng, design: "random" | "lhs") {
  const dims: { q: number; k: number; m: Marginal }[] = [];
  for (const q of usedRows) {
    const raw = ltRows[q]!.raw;
    LT_PARAMS.forEach((p, k) => {
      const v = raw[p];
      if (v === null || v === undefined || v === "") return;
      const sp = rowSpread(raw, p) ?? u.lifetimes?.[p];
      if (!sp) return;
      try {
        dims.push({ q, k, m: resolveSpread(sp, Number(v), `step ${o.id}: uncertainty of lifetimes row ${q + 1} ${p}`) });
      } catch (e) {
        throw new DataError((e as Error).message);
      }
    });
  }
  let ltValues: Float64Array | null = null;
  if (dims.length) {
    const x = sampleInputs(dims.map((d) => d.m), design, D, rng);
    ltValues = new Float64Array(ltRows.length * 4 * D).fill(NaN);
    dims.forEach((d, i) => {
      for (let r = 0; r < D; r++) ltValues![(d.q * 4 + d.k) * D + r] = x[r * dims.length + i]!;
    });
  }
  let ctFactors: Float64Array | null = null;
  if (u.content && M) {
    const f = factorMarginal(u.content, "uncertainty.content");
    const x = sampleInputs(Array(M).fill(f), design, D, rng);
    ctFactors = new Float64Array(M * D);
    for (let m = 0; m < M; m++) for (let r = 0; r < D; r++) ctFactors[m * D + r] = x[r * M + m]!;
  }
  return { ltValues, ctFactors };
}

function concat(a: Float64Array | null, b: Float64Array | null, N: number): Float64Array | null {
  if (!a || !b) return null;
  // Row-wise [r·N + j] tables of N draws each, joined into tables of 2N draws.
  const rows = a.length / N;
  const out = new Float64Array(rows * 2 * N);
  for (let r = 0; r < rows; r++) {
    out.set(a.subarray(r * N, (r + 1) * N), r * 2 * N);
    out.set(b.subarray(r * N, (r + 1) * N), r * 2 * N + N);
  }
  return out;
}

/** An aggregate step downstream that sums this model's table over groups of one key. */
export interface GroupTotal {
  by: string;
  table: string;
  groups: Map<string, Set<string>>;
}

export function buildJob(o: O, inp: Inputs, groups: Group[], A: number, rowOf: RowOf, lt: { rows: ParamRow[] }, curveTables: CurveTable,
  content: { rows: ParamRow[]; keyCols: string[] } | null, materials: string[], curveLength: number, sobol: boolean, groupTotals: GroupTotal[] = []): Built {
  const u = o.uncertainty!;
  const { n, T } = inp;
  const M = materials.length;
  const usedRows = [...new Set(groups.flatMap((g) => [...g.curves, ...g.initCurves].filter((c): c is Curve => Boolean(c)).map(rowOf).filter((q) => q >= 0)))].sort((a, b) => a - b);
  const assumptions = declared(u, usedRows.some((q) => LT_PARAMS.some((p) => rowSpread(lt.rows[q]!.raw, p))));
  const rng = new Rng(u.seed);
  let D: number;
  let tables: { ltValues: Float64Array | null; ctFactors: Float64Array | null };
  let idx: Int32Array;
  let runs: number;
  if (!sobol) {
    D = u.draws;
    tables = drawTables(o, u, lt.rows, usedRows, M, D, rng, u.sampling);
    runs = D;
    idx = new Int32Array(3 * D);
    for (let d = 0; d < D; d++) idx.fill(d, 3 * d, 3 * d + 3);
  } else {
    // Saltelli's design: A and B independent samples of N draws; A_B^(i) takes assumption i from B.
    const N = u.sensitivity!.base;
    const srng = new Rng(u.seed + 1);
    const a = drawTables(o, u, lt.rows, usedRows, M, N, srng, u.sampling);
    const b = drawTables(o, u, lt.rows, usedRows, M, N, srng, u.sampling);
    D = 2 * N;
    tables = { ltValues: concat(a.ltValues, b.ltValues, N), ctFactors: concat(a.ctFactors, b.ctFactors, N) };
    const k = assumptions.length;
    runs = N * (k + 2);
    idx = new Int32Array(3 * runs);
    const slot = (x: (typeof ASSUMPTIONS)[number]) => ASSUMPTIONS.indexOf(x);
    for (let j = 0; j < N; j++) {
      idx.fill(j, 3 * j, 3 * j + 3);
      idx.fill(N + j, 3 * (N + j), 3 * (N + j) + 3);
      assumptions.forEach((x, i) => {
        const r = (2 + i) * N + j;
        idx.fill(j, 3 * r, 3 * r + 3);
        idx[3 * r + slot(x)] = N + j;
      });
    }
  }
  // Per-series content of the model cohorts and of those in place, and the amounts in place.
  const contentAll = M ? new Float64Array(n * M * T) : null;
  const initContentAll = M && A ? new Float64Array(n * M * A) : null;
  const amountsAll = A ? new Float64Array(n * A) : null;
  const mcGroups: McGroup[] = groups.map((g) => {
    const gn = g.sids.length;
    const amounts = amountsOf(inp, g, A);
    if (amounts) g.sids.forEach((sid, j) => amountsAll!.set(amounts.subarray(j * A, j * A + A), sid * A));
    let gc = null;
    if (M) {
      gc = groupContent(o, inp, g, A, materials, content, amounts);
      g.sids.forEach((sid, j) => {
        contentAll!.set(gc!.content.subarray(j * M * T, (j + 1) * M * T), sid * M * T);
        if (initContentAll) initContentAll.set(gc!.initContent.subarray(j * M * A, (j + 1) * M * A), sid * M * A);
      });
    }
    const cohortRow = Int32Array.from(g.curves, (c) => rowOf(c));
    let initRow: Int32Array | null = null;
    let initFixed: McGroup["initFixed"] = null;
    if (amounts && g.initCurves.length) {
      if (inp.carried) {
        const ic = initialContribution({ byAge: amounts, total: new Float64Array(gn), A, curves: g.initCurves }, gn, T);
        let mat = null;
        if (M && gc) {
          const byAge = new Float64Array(gn * M * A);
          for (let j = 0; j < gn; j++) for (let m = 0; m < M; m++) for (let a = 0; a < A; a++) byAge[(j * M + m) * A + a] = amounts[j * A + a]! * gc.initContent[(j * M + m) * A + a]!;
          mat = initialContribution({ byAge, total: new Float64Array(gn * M), A, curves: g.initCurves }, gn * M, T);
        }
        initFixed = { stock0: ic.stock0, stock: ic.stock, outflow: ic.outflow, matStock0: mat?.stock0 ?? null, matStock: mat?.stock ?? null, matOutflow: mat?.outflow ?? null };
      } else {
        initRow = Int32Array.from(g.initCurves, (c) => (c ? rowOf(c) : -1));
      }
    }
    return { sids: Int32Array.from(g.sids), cohortRow, initRow, initFixed };
  });
  // Totals: cells per level, numbered in the order of the series (key order). The levels of
  // `totals:`, then one level per group of each aggregate step that sums this model's table
  // (a member may belong to several groups: one level each).
  const cells: Built["cells"] = [];
  const levels: { over: string; cell: (sid: number) => (string | null)[] | null }[] = u.totals.map((level) => {
    const over = o.keys.filter((k) => !level.includes(k));
    return { over: over.length ? over.join(",") : "(none)", cell: (sid) => o.keys.map((k, i) => (level.includes(k) ? inp.keyValues[sid]![i]! : null)) };
  });
  for (const a of groupTotals) {
    const bi = o.keys.indexOf(a.by);
    for (const [group, members] of a.groups) {
      levels.push({ over: `${a.by}:${a.table}`, cell: (sid) => (members.has(inp.keyValues[sid]![bi]!) ? o.keys.map((k, i) => (i === bi ? group : inp.keyValues[sid]![i]!)) : null) });
    }
  }
  const index = new Int32Array(levels.length * n).fill(-1);
  levels.forEach((level, l) => {
    const at = new Map<string, number>();
    for (let sid = 0; sid < n; sid++) {
      const values = level.cell(sid);
      if (!values) continue;
      const key = JSON.stringify(values);
      let c = at.get(key);
      if (c === undefined) {
        c = cells.length;
        at.set(key, c);
        cells.push({ over: level.over, values });
      }
      index[l * n + sid] = c;
    }
  });
  const rows = lt.rows.map((r) => {
    const raw = r.raw;
    const num = (x: unknown) => (x === null || x === undefined || x === "" ? null : Number(x));
    return { distribution: String(raw.distribution ?? ""), mean: num(raw.mean), sd: num(raw.sd), shape: num(raw.shape), scale: num(raw.scale),
      curve: raw.curve === null || raw.curve === undefined || raw.curve === "" ? null : String(raw.curve), label: String(r.index + 1) };
  });
  const job: McJob = {
    step: o.id, mode: o.mode, clamp: o.negative_inflow === "clamp", n, T, A, curveLength, runs, idx, rows, tables: Object.fromEntries(curveTables),
    ltValues: tables.ltValues, ltDraws: D, groups: mcGroups, values: inp.value, initAmounts: amountsAll, M, content: contentAll, initContent: initContentAll,
    ctFactors: tables.ctFactors, ctDraws: D,
    input: u.input ? { spread: u.input.spread, correlation: u.input.correlation, seed: u.seed * 7 + 3 } : null,
    probabilities: u.quantiles, variables: u.variables, totals: { index, levels: levels.length, cells: cells.length },
    sobol: sobol ? { base: u.sensitivity!.base, assumptions, resamples: u.sensitivity!.resamples, confidence: u.sensitivity!.confidence, seed: u.seed + 2 } : null,
  };
  return { job, assumptions, cells };
}

async function run(ctx: StepContext, o: O, job: McJob, what: string): Promise<McOutcome> {
  const tick = ctx.progress.counter(`step ${o.id}: ${what}`, 1);
  try {
    return await runMonteCarlo(job, { progress: (done, total) => tick(done / total) });
  } catch (e) {
    if (e instanceof DrawError || /uncertainty draw/.test((e as Error).message)) throw new DataError((e as Error).message);
    throw e;
  }
}

const VAR_NAMES = ["inflow", "outflow", "stock"] as const;

/** The totals cells as a table: cell, total_over and the key values kept. */
async function writeCells(ctx: StepContext, o: O, name: string, cells: Built["cells"]): Promise<void> {
  const s = ctx.session;
  const cols = o.keys.map((k) => `${ident(k)} VARCHAR`).join(", ");
  await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(name)} (cell INTEGER, total_over VARCHAR, ${cols})`);
  for (let i = 0; i < cells.length; i += 500) {
    const part = cells.slice(i, i + 500).map((c, j) => `(${i + j}, ${lit(c.over)}, ${c.values.map((v) => (v === null ? "NULL" : lit(v))).join(", ")})`);
    await s.run(`INSERT INTO ${ident(name)} VALUES ${part.join(", ")}`);
  }
}

export async function runUncertainty(ctx: StepContext, o: O, inp: Inputs, groups: Group[], A: number, rowOf: RowOf, lt: { rows: ParamRow[] }, curveTables: CurveTable,
  content: { rows: ParamRow[]; keyCols: string[] } | null, materials: string[], curveLength: number, res: Results): Promise<void> {
  const u = o.uncertainty!;
  const s = ctx.session;
  const { n, T, y0 } = inp;
  const M = materials.length;
  const gt = await groupTotals(ctx, o);
  const built = buildJob(o, inp, groups, A, rowOf, lt, curveTables, content, materials, curveLength, false, gt);
  ctx.progress.info(`step ${o.id}: Monte Carlo, ${built.job.runs} draws of ${n} series × ${T} years over ${built.assumptions.join(", ")}`);
  const mc = await run(ctx, o, built.job, `${u.draws} draws`);
  const P = u.quantiles.length;
  // Rows: series (product variables, then held materials' stock and outflow), then totals.
  const rowsKind: number[] = [];
  const rowsId: number[] = [];
  const rowsMat: number[] = [];
  const rowsVar: number[] = [];
  const central: number[] = [];
  const mean: number[] = [];
  const sd: number[] = [];
  const qs: number[][] = u.quantiles.map(() => []);
  const yi: number[] = [];
  const push = (kind: number, id: number, mat: number, v: number, t: number, c: number, st: { mean: Float64Array; sd: Float64Array; quantiles: Float64Array[] }, at: number) => {
    rowsKind.push(kind); rowsId.push(id); rowsMat.push(mat); rowsVar.push(v); yi.push(t);
    central.push(c); mean.push(st.mean[at]!); sd.push(st.sd[at]!);
    for (let p = 0; p < P; p++) qs[p]!.push(st.quantiles[p]![at]!);
  };
  const centralOf = [res.inflow, res.outflow, res.stock];
  for (let sid = 0; sid < n; sid++) {
    for (const v of [0, 1, 2]) {
      const st = mc.stats[v];
      if (!st) continue;
      for (let t = 0; t < T; t++) push(0, sid, -1, v, t, centralOf[v]![sid * T + t]!, st, sid * T + t);
    }
    if (res.mat) for (let m = 0; m < M; m++) {
      if (!res.holds[sid * M + m]) continue;
      for (const [w, v] of [[0, 2], [1, 1]] as const) {
        const st = mc.stats[3 + 2 * m + w];
        if (!st) continue;
        const cen = v === 2 ? res.mat.stock : res.mat.outflow;
        for (let t = 0; t < T; t++) push(0, sid, m, v, t, cen[(sid * M + m) * T + t]!, st, sid * T + t);
      }
    }
  }
  // Totals: product variables, then material stocks; central values summed from the deterministic run.
  const TV = 3 + M;
  const tcentral = new Float64Array(built.cells.length * TV * T);
  for (let l = 0; l < built.job.totals.levels; l++) for (let sid = 0; sid < n; sid++) {
    const cell = built.job.totals.index[l * n + sid]!;
    for (let v = 0; v < 3; v++) for (let t = 0; t < T; t++) tcentral[(cell * TV + v) * T + t]! += centralOf[v]![sid * T + t]!;
    if (res.mat) for (let m = 0; m < M; m++) for (let t = 0; t < T; t++) tcentral[(cell * TV + 3 + m) * T + t]! += res.mat.stock[(sid * M + m) * T + t]!;
  }
  if (mc.totalStats) for (let cell = 0; cell < built.cells.length; cell++) {
    for (const v of [0, 1, 2]) {
      if (!u.variables.includes(VAR_NAMES[v]!)) continue;
      for (let t = 0; t < T; t++) push(1, cell, -1, v, t, tcentral[(cell * TV + v) * T + t]!, mc.totalStats, (cell * TV + v) * T + t);
    }
    if (u.variables.includes("stock")) for (let m = 0; m < M; m++) {
      for (let t = 0; t < T; t++) push(1, cell, m, 2, t, tcentral[(cell * TV + 3 + m) * T + t]!, mc.totalStats, (cell * TV + 3 + m) * T + t);
    }
  }
  const raw = `__${o.id}_mcraw`;
  const N = rowsKind.length;
  await writeColumns(s, raw, [
    { name: "kind", kind: "i32", data: Int32Array.from(rowsKind) }, { name: "id", kind: "i32", data: Int32Array.from(rowsId) },
    { name: "mi", kind: "i32", data: Int32Array.from(rowsMat) }, { name: "vi", kind: "i32", data: Int32Array.from(rowsVar) },
    { name: "yi", kind: "i32", data: Int32Array.from(yi) }, { name: "central", kind: "f64", data: Float64Array.from(central) },
    { name: "mean", kind: "f64", data: Float64Array.from(mean) }, { name: "sd", kind: "f64", data: Float64Array.from(sd) },
    ...u.quantiles.map((p, i) => ({ name: quantileColumn(p), kind: "f64" as const, data: Float64Array.from(qs[i]!) })),
  ], N);
  const cellsT = `__${o.id}_mccells`;
  await writeCells(ctx, o, cellsT, built.cells);
  const names = `__${o.id}_mcnames`;
  await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(names)} AS SELECT * FROM (VALUES ${materials.map((m, i) => `(${i}, ${lit(m)})`).concat(["(-1, CAST(NULL AS VARCHAR))"]).join(", ")}) t(mi, material)`);
  const matUnit = inp.unit === "piece" ? ctx.pipeline.base_unit : inp.unit;
  const K = o.keys.map((k) => ident(k));
  const keySel = o.keys.map((k) => `CASE WHEN r.kind = 0 THEN CAST(m.${ident(k)} AS VARCHAR) ELSE c.${ident(k)} END AS ${ident(k)}`).join(", ");
  const qSel = u.quantiles.map((p) => `r.${ident(quantileColumn(p))}`).join(", ");
  const name = `${o.id}_uncertainty`;
  // Key columns keep their declared type for series rows; totals leave summed keys empty.
  const keyTypes = await s.all(`SELECT column_name, column_type AS data_type FROM (DESCRIBE ${ident(sidTable(o))})`);
  const typeOf = new Map(keyTypes.map((r) => [String(r.column_name), String(r.data_type)]));
  await s.run(`CREATE OR REPLACE TABLE ${ident(name)} AS
    SELECT ${o.keys.map((k) => `CAST(x.${ident(k)} AS ${typeOf.get(k)}) AS ${ident(k)}`).join(", ")}, total_over, material, variable, year, central, mean, sd, ${u.quantiles.map((p) => ident(quantileColumn(p))).join(", ")}, unit
    FROM (SELECT ${keySel}, CASE WHEN r.kind = 0 THEN NULL ELSE c.total_over END AS total_over, nm.material,
        ['inflow', 'outflow', 'stock'][r.vi + 1] AS variable, CAST(r.yi + ${y0} AS BIGINT) AS year, r.central,
        r.mean, CASE WHEN isnan(r.sd) THEN NULL ELSE r.sd END AS sd, ${qSel}, CASE WHEN r.mi < 0 THEN ${lit(inp.unit)} ELSE ${lit(matUnit)} END AS unit
      FROM ${ident(raw)} r LEFT JOIN ${ident(sidTable(o))} m ON r.kind = 0 AND m.sid = r.id LEFT JOIN ${ident(cellsT)} c ON r.kind = 1 AND c.cell = r.id
      JOIN ${ident(names)} nm ON nm.mi = r.mi) x
    ORDER BY ${K.join(" NULLS LAST, ")} NULLS LAST, total_over NULLS FIRST, material NULLS FIRST, variable, year`);
  await totalsAudit(ctx, o, name, gt);
  if (u.sensitivity) await sensitivity(ctx, o, inp, groups, A, rowOf, lt, curveTables, content, materials, curveLength, cellsT, gt);
  for (const t of [raw, cellsT, names]) await s.run(`DROP TABLE IF EXISTS ${ident(t)}`);
}

/** The aggregate steps that sum this model's main table over groups of one of its keys, with their groups. */
async function groupTotals(ctx: StepContext, o: O): Promise<GroupTotal[]> {
  const out: GroupTotal[] = [];
  for (const st of ctx.pipeline.steps) {
    const a = st as unknown as { kind: string; input?: string; by?: string; groups?: string };
    if (a.kind !== "aggregate" || a.input !== o.id || !a.groups || !ctx.tables.has(a.groups)) continue;
    const by = a.by ?? "region";
    if (!o.keys.includes(by) || out.some((x) => x.by === by && x.table === a.groups)) continue;
    const groups = new Map<string, Set<string>>();
    for (const r of await ctx.session.all(`SELECT DISTINCT CAST("group" AS VARCHAR) AS g, CAST(member AS VARCHAR) AS m FROM ${ident(a.groups)} WHERE "group" IS NOT NULL AND member IS NOT NULL ORDER BY 1, 2`)) {
      const set = groups.get(String(r.g)) ?? new Set<string>();
      set.add(String(r.m));
      groups.set(String(r.g), set);
    }
    out.push({ by, table: a.groups, groups });
  }
  return out;
}

/** Totals must come from per-draw sums: their mean is the sum of the series' means, their sd at most the sum of their sds. */
async function totalsAudit(ctx: StepContext, o: O, table: string, gt: GroupTotal[]): Promise<void> {
  const K = o.keys.map((k) => ident(k));
  // The series' sums are taken in key order: a parallel sum's order (and its last bits) would
  // follow the table's layout, and a merged run must audit to the same bytes as a single one.
  // A total's series: those agreeing on every key it keeps; for a group total, those whose key is a member of the group.
  const part = (where: string, match: (k: string) => string) => `SELECT t.total_over, ${K.map((k) => `t.${k}`).join(", ")}, t.material, t.variable, t.year, any_value(t.mean) AS tm, any_value(t.sd) AS tsd,
      sum(s.mean ORDER BY ${K.map((k) => `s.${k}`).join(", ")}) AS sm, sum(s.sd ORDER BY ${K.map((k) => `s.${k}`).join(", ")}) AS ssd
    FROM ${ident(table)} t JOIN ${ident(table)} s ON s.total_over IS NULL AND ${where} AND ${o.keys.map(match).join(" AND ")}
      AND s.material IS NOT DISTINCT FROM t.material AND s.variable = t.variable AND s.year = t.year
    GROUP BY ALL`;
  const kept = (k: string) => `(t.${ident(k)} IS NULL OR CAST(t.${ident(k)} AS VARCHAR) = CAST(s.${ident(k)} AS VARCHAR))`;
  const parts = [part("t.total_over IS NOT NULL AND t.total_over NOT LIKE '%:%'", kept)];
  for (const g of gt) {
    parts.push(part(`t.total_over = ${lit(`${g.by}:${g.table}`)}`, (k) => (k === g.by
      ? `EXISTS (SELECT 1 FROM ${ident(g.table)} m WHERE CAST(m."group" AS VARCHAR) = CAST(t.${ident(k)} AS VARCHAR) AND CAST(m.member AS VARCHAR) = CAST(s.${ident(k)} AS VARCHAR))`
      : kept(k))));
  }
  const agg = parts.join(" UNION ALL ");
  const keysMap = `map_from_entries([${o.keys.map((k) => `{'key': ${lit(k)}, 'value': coalesce(CAST(${ident(k)} AS VARCHAR), '(all)')}`).join(", ")}, {'key': 'variable', 'value': variable || coalesce(' ' || material, '')}])`;
  await ctx.audits.check({
    step: o.id, check: "uncertainty-totals", severity: "error",
    items: `SELECT ${keysMap} AS keys, year, tm AS observed, sm AS expected, 1e-9 * greatest(1, abs(sm)) AS tolerance,
        CASE WHEN coalesce(tsd, 0) > coalesce(ssd, 0) * (1 + 1e-9) + 1e-9 THEN 'sd of the total ' || printf('%.10g', tsd) || ' exceeds the sum of the series'' sds ' || printf('%.10g', ssd) || ' (impossible for a sum of draws: Minkowski''s inequality)'
          ELSE 'mean of the per-draw totals ' || printf('%.10g', tm) || ' differs from the sum of the series'' means ' || printf('%.10g', sm) || ' (linearity of expectation)' END AS message
      FROM (${agg})`,
    failWhen: "abs(observed - expected) > tolerance OR message LIKE 'sd of the total%'",
    failMessage: "a total's range does not come from per-draw sums",
  });
}

async function sensitivity(ctx: StepContext, o: O, inp: Inputs, groups: Group[], A: number, rowOf: RowOf, lt: { rows: ParamRow[] }, curveTables: CurveTable,
  content: { rows: ParamRow[]; keyCols: string[] } | null, materials: string[], curveLength: number, cellsT: string, gt: GroupTotal[]): Promise<void> {
  const u = o.uncertainty!;
  const s = ctx.session;
  const { n, T, y0 } = inp;
  const built = buildJob(o, inp, groups, A, rowOf, lt, curveTables, content, materials, curveLength, true, gt);
  const k = built.assumptions.length;
  ctx.progress.info(`step ${o.id}: sensitivity, ${built.job.runs} runs (N = ${u.sensitivity!.base}, k = ${k})`);
  const mc = await run(ctx, o, built.job, "sensitivity");
  const M = materials.length;
  const TV = 3 + M;
  const kind: number[] = [], id: number[] = [], vi: number[] = [], yi: number[] = [], ai: number[] = [];
  const cols = { first: [] as number[], total: [] as number[], firstLow: [] as number[], firstHigh: [] as number[], totalLow: [] as number[], totalHigh: [] as number[] };
  const push = (kd: number, i: number, v: number, t: number, src: { first: Float64Array; total: Float64Array; firstLow: Float64Array; firstHigh: Float64Array; totalLow: Float64Array; totalHigh: Float64Array }, at: number) => {
    for (let a = 0; a < k; a++) {
      kind.push(kd); id.push(i); vi.push(v); yi.push(t); ai.push(a);
      for (const f of Object.keys(cols) as (keyof typeof cols)[]) cols[f].push(src[f][at * k + a]!);
    }
  };
  for (let sid = 0; sid < n; sid++) for (const v of [1, 2]) {
    const so = mc.sobol[v];
    if (!so) continue;
    for (let t = 0; t < T; t++) push(0, sid, v, t, so, sid * T + t);
  }
  if (mc.totalSobol) for (let cell = 0; cell < built.cells.length; cell++) for (const v of [1, 2]) {
    if (!u.variables.includes(VAR_NAMES[v]!)) continue;
    for (let t = 0; t < T; t++) push(1, cell, v, t, mc.totalSobol, (cell * TV + v) * T + t);
  }
  const raw = `__${o.id}_sobraw`;
  const nan = (x: number[]) => Float64Array.from(x);
  await writeColumns(s, raw, [
    { name: "kind", kind: "i32", data: Int32Array.from(kind) }, { name: "id", kind: "i32", data: Int32Array.from(id) }, { name: "vi", kind: "i32", data: Int32Array.from(vi) },
    { name: "yi", kind: "i32", data: Int32Array.from(yi) }, { name: "ai", kind: "i32", data: Int32Array.from(ai) },
    { name: "first_order", kind: "f64", data: nan(cols.first) }, { name: "total_effect", kind: "f64", data: nan(cols.total) },
    { name: "first_order_low", kind: "f64", data: nan(cols.firstLow) }, { name: "first_order_high", kind: "f64", data: nan(cols.firstHigh) },
    { name: "total_effect_low", kind: "f64", data: nan(cols.totalLow) }, { name: "total_effect_high", kind: "f64", data: nan(cols.totalHigh) },
  ], kind.length);
  const keyTypes = await s.all(`SELECT column_name, column_type AS data_type FROM (DESCRIBE ${ident(sidTable(o))})`);
  const typeOf = new Map(keyTypes.map((r) => [String(r.column_name), String(r.data_type)]));
  const K = o.keys.map((kk) => ident(kk));
  const nn = (c: string) => `CASE WHEN isnan(r.${c}) THEN NULL ELSE r.${c} END AS ${c}`;
  await s.run(`CREATE OR REPLACE TABLE ${ident(`${o.id}_sensitivity`)} AS
    SELECT ${o.keys.map((kk) => `CAST(x.${ident(kk)} AS ${typeOf.get(kk)}) AS ${ident(kk)}`).join(", ")}, total_over, variable, year, assumption,
      first_order, total_effect, first_order_low, first_order_high, total_effect_low, total_effect_high, base_samples, confidence
    FROM (SELECT ${o.keys.map((kk) => `CASE WHEN r.kind = 0 THEN CAST(m.${ident(kk)} AS VARCHAR) ELSE c.${ident(kk)} END AS ${ident(kk)}`).join(", ")},
        CASE WHEN r.kind = 0 THEN NULL ELSE c.total_over END AS total_over, ['inflow', 'outflow', 'stock'][r.vi + 1] AS variable, CAST(r.yi + ${y0} AS BIGINT) AS year,
        [${built.assumptions.map(lit).join(", ")}][r.ai + 1] AS assumption,
        ${["first_order", "total_effect", "first_order_low", "first_order_high", "total_effect_low", "total_effect_high"].map(nn).join(", ")},
        CAST(${u.sensitivity!.base} AS INTEGER) AS base_samples, CAST(${u.sensitivity!.confidence} AS DOUBLE) AS confidence
      FROM ${ident(raw)} r LEFT JOIN ${ident(sidTable(o))} m ON r.kind = 0 AND m.sid = r.id LEFT JOIN ${ident(cellsT)} c ON r.kind = 1 AND c.cell = r.id) x
    ORDER BY ${K.join(" NULLS LAST, ")} NULLS LAST, total_over NULLS FIRST, variable, year, assumption`);
  await s.run(`DROP TABLE IF EXISTS ${ident(raw)}`);
}
