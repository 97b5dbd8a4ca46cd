/**
 * A cohort model's inputs read into typed arrays: the series index (one id per key
 * combination, in key order), the value matrix (series × years), and the stock in place at the
 * start (an initial_stock table, or the end state of the model this one continues).
 */
import { DataError } from "../../errors.js";
import type { Session } from "../../engine/session.js";
import { ident, idents } from "../../engine/sql.js";
import { readColumns } from "../../engine/handoff.js";
import { describeSeries } from "../../ops/param-match.js";
import type { StepContext } from "../types.js";
import { endState, type CarriedStock } from "./carry.js";
import type { O } from "./options.js";

export interface Inputs {
  unit: string;
  y0: number;
  y1: number;
  T: number;
  n: number;
  keyValues: string[][];
  /** n × T values (inflow or stock path), 0 where absent. */
  value: Float64Array;
  /** Indices (sid·T + t) of missing series-years. */
  missing: number[];
  /** Inflow-driven with negative_inflow: clamp: the negative inflows set to 0 (index sid·T + t, value). */
  clamped: { at: number; value: number }[];
  /** The stock in place: by age per series, or the total per series (steady-state ages). */
  init: { byAge: Float64Array | null; total: Float64Array | null; A: number } | null;
  /** A continued model's stock, and each series' index in it (−1: not in the earlier model). */
  carried: { stock: CarriedStock; from: Int32Array; orphans: number[] } | null;
}

export const sidTable = (o: O) => `__${o.id}_sid`;

export async function readInputs(ctx: StepContext, o: O): Promise<Inputs> {
  const s = ctx.session;
  const K = idents(o.keys);
  const inCols = await ctx.columnsOf(o.input);
  let unit = ctx.pipeline.base_unit;
  if (inCols.includes("unit")) {
    const units = await s.all(`SELECT DISTINCT CAST(unit AS VARCHAR) AS u FROM ${ident(o.input)} ORDER BY 1`);
    if (units.length > 1) throw new DataError(`step ${o.id}: input ${o.input} mixes units ${units.map((u) => u.u).join(", ")}; a cohort model needs one unit per input table`);
    if (units.length === 1 && units[0]!.u !== null) unit = String(units[0]!.u);
  }
  const nulls = await s.all(`SELECT ${K}, year FROM ${ident(o.input)} WHERE ${ident(o.value)} IS NULL OR year IS NULL OR NOT isfinite(CAST(${ident(o.value)} AS DOUBLE)) LIMIT 3`);
  if (nulls.length) throw new DataError(`step ${o.id}: input ${o.input} has missing or non-finite ${o.value} (e.g. ${JSON.stringify(nulls[0])})`);
  const dups = await s.all(`SELECT ${K}, year, count(*) AS n FROM ${ident(o.input)} GROUP BY ALL HAVING count(*) > 1 ORDER BY ALL LIMIT 3`);
  if (dups.length) throw new DataError(`step ${o.id}: input ${o.input} has several rows for one series-year, e.g. ${JSON.stringify(dups[0])}; aggregate first`);
  const span = await s.one(`SELECT min(year) AS y0, max(year) AS y1, count(*) AS n FROM ${ident(o.input)}`);
  if (Number(span.n) === 0) throw new DataError(`step ${o.id}: input ${o.input} is empty`);
  const y0 = Number(span.y0);
  const y1 = Number(span.y1);
  const T = y1 - y0 + 1;
  await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(sidTable(o))} AS
    SELECT CAST(row_number() OVER (ORDER BY ${K}) - 1 AS INTEGER) AS sid, ${K} FROM (SELECT DISTINCT ${K} FROM ${ident(o.input)})`);
  const rows = await s.all(`SELECT ${o.keys.map((c) => `CAST(${ident(c)} AS VARCHAR) AS ${ident(c)}`).join(", ")} FROM ${ident(sidTable(o))} ORDER BY sid`);
  const keyValues = rows.map((r) => o.keys.map((c) => String(r[c])));
  const n = keyValues.length;
  const { rows: nr, columns } = await readColumns(s,
    `SELECT m.sid, CAST(i.year - ${y0} AS INTEGER) AS yi, CAST(${ident(o.value)} AS DOUBLE) AS v
     FROM ${ident(o.input)} i JOIN ${ident(sidTable(o))} m USING (${K})`, ["i32", "i32", "f64"]);
  const [sid, yi, v] = columns as [Int32Array, Int32Array, Float64Array];
  const value = new Float64Array(n * T);
  const present = new Uint8Array(n * T);
  for (let r = 0; r < nr; r++) {
    const idx = sid[r]! * T + yi[r]!;
    value[idx] = v[r]!;
    present[idx] = 1;
  }
  const missing: number[] = [];
  for (let i = 0; i < n * T; i++) if (!present[i]) missing.push(i);
  if (missing.length && o.mode === "stock-driven") {
    const i = missing[0]!;
    throw new DataError(`step ${o.id}: the stock path of series ${describeSeries(o.keys, keyValues[Math.floor(i / T)]!)} has no value for ${y0 + (i % T)} (${missing.length} series-years missing); a stock-driven model needs every year`);
  }
  const clamped: { at: number; value: number }[] = [];
  if (o.mode === "inflow-driven" && o.negative_inflow === "clamp") {
    for (let i = 0; i < n * T; i++) if (value[i]! < 0) {
      clamped.push({ at: i, value: value[i]! });
      value[i] = 0;
    }
  }
  const base = { unit, y0, y1, T, n, keyValues, value, missing, clamped };
  if (o.continues) return { ...base, init: null, carried: carried(ctx, o, base) };
  return { ...base, init: o.initial_stock ? await initialStock(s, ctx, o, n) : null, carried: null };
}

async function initialStock(s: Session, ctx: StepContext, o: O, n: number): Promise<Inputs["init"]> {
  const t = o.initial_stock!;
  const K = idents(o.keys);
  const icols = await ctx.columnsOf(t);
  const orphan = await s.all(`SELECT ${K} FROM ${ident(t)} EXCEPT SELECT ${K} FROM ${ident(sidTable(o))} LIMIT 1`);
  if (orphan.length) throw new DataError(`step ${o.id}: initial_stock has a row for series ${JSON.stringify(orphan[0])} that is not in the input ${o.input}`);
  const bad = await s.all(`SELECT ${K} FROM ${ident(t)} WHERE value IS NULL OR NOT isfinite(CAST(value AS DOUBLE)) OR value < 0 LIMIT 1`);
  if (bad.length) throw new DataError(`step ${o.id}: initial_stock ${t} has a missing, negative or non-finite value for series ${JSON.stringify(bad[0])}; accepted: a stock ≥ 0`);
  if (icols.includes("age")) {
    const badAge = await s.all(`SELECT ${K}, age FROM ${ident(t)} WHERE age IS NULL OR age < 0 OR age <> round(age) LIMIT 1`);
    if (badAge.length) throw new DataError(`step ${o.id}: initial_stock age must be a whole number ≥ 0 (got ${JSON.stringify(badAge[0])})`);
    const A = Number(await s.scalar(`SELECT coalesce(max(age), -1) + 1 FROM ${ident(t)}`));
    const { rows, columns } = await readColumns(s, `SELECT m.sid, CAST(i.age AS INTEGER), CAST(i.value AS DOUBLE) FROM ${ident(t)} i JOIN ${ident(sidTable(o))} m USING (${K})`, ["i32", "i32", "f64"]);
    const byAge = new Float64Array(n * A);
    for (let r = 0; r < rows; r++) byAge[(columns[0] as Int32Array)[r]! * A + (columns[1] as Int32Array)[r]!] += (columns[2] as Float64Array)[r]!;
    return { byAge, total: null, A };
  }
  const { rows, columns } = await readColumns(s, `SELECT m.sid, CAST(sum(i.value ORDER BY i.value) AS DOUBLE) FROM ${ident(t)} i JOIN ${ident(sidTable(o))} m USING (${K}) GROUP BY m.sid`, ["i32", "f64"]);
  const total = new Float64Array(n);
  for (let r = 0; r < rows; r++) total[(columns[0] as Int32Array)[r]!] = (columns[1] as Float64Array)[r]!;
  return { byAge: null, total, A: 0 };
}

function carried(ctx: StepContext, o: O, b: { y0: number; n: number; keyValues: string[][]; unit: string }): Inputs["carried"] {
  const from = o.continues!;
  const st = ctx.carry.get(from.step);
  if (!st) throw new Error(`step ${o.id}: no end state kept for step ${from.step}`); // the plan orders and keeps it: an internal error
  const year = from.year ?? st.y0 + st.T - 1;
  if (year < st.y0 || year > st.y0 + st.T - 1) {
    throw new DataError(`step ${o.id}: continues.year ${year} is outside the years of step ${from.step} (${st.y0}–${st.y0 + st.T - 1})`);
  }
  if (b.y0 !== year + 1) {
    throw new DataError(`step ${o.id}: continues step ${from.step} from the end of ${year}, so its input ${o.input} must start in ${year + 1}; it starts in ${b.y0}`);
  }
  if (st.unit !== b.unit) throw new DataError(`step ${o.id}: the input is in ${b.unit} but step ${from.step} is in ${st.unit}; a continued model keeps one unit`);
  const stock = endState(st, year);
  const index = new Map(st.keyValues.map((k, i) => [JSON.stringify(k), i]));
  const map = new Int32Array(b.n).fill(-1);
  const seen = new Uint8Array(st.keyValues.length);
  b.keyValues.forEach((k, i) => {
    const j = index.get(JSON.stringify(k));
    if (j !== undefined) {
      map[i] = j;
      seen[j] = 1;
    }
  });
  const orphans: number[] = [];
  for (let j = 0; j < seen.length; j++) {
    if (seen[j]) continue;
    let left = 0;
    for (let a = 0; a < stock.A; a++) left += stock.amounts[j * stock.A + a]!;
    if (left > 0) orphans.push(j);
  }
  return { stock, from: map, orphans };
}
