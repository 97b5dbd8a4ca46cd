/**
 * `yearly-path`: anchor-year values (targets per capita, shares, any value table) become one
 * row per series and year, by linear interpolation, the monotone cubic of Fritsch and Carlson
 * (no kinks, monotone data stay monotone), or holding each value until the next anchor; then
 * optionally multiplied by a yearly driver (population × stock per capita). Series, years and
 * the driver's coverage are checked; nothing is extrapolated unless asked (`before`, `after`).
 */
import { z } from "zod";
import { Name, UnitText } from "../spec/common.js";
import { DataError } from "../errors.js";
import { ident, idents, lit } from "../engine/sql.js";
import { readColumns, writeColumns } from "../engine/handoff.js";
import { interpolate, PATH_METHODS } from "../cohort/interpolate.js";
import { describeSeries } from "../ops/param-match.js";
import { isMassUnit, massFactor, PIECE } from "../units.js";
import { defineStep, type ColumnDecl, type OutputDecl, type TableSchema } from "./types.js";
import { hasColumns, keyFrom, unitColumn, year } from "./columns.js";
import { raise, rowsWhere } from "../ops/config-table.js";

const Options = z.object({
  input: Name.describe("anchor values: keys…, year, value columns (one row per series and anchor year)"),
  keys: z.array(Name).optional().describe("series key columns (default: the input's keys other than year)"),
  values: z.array(Name).min(1).optional().describe("columns to interpolate (default: every DOUBLE column that is not a key)"),
  method: z.enum(PATH_METHODS).default("monotone-cubic").describe("linear, monotone-cubic (Fritsch–Carlson, no kinks) or step (hold each anchor's value until the next)"),
  years: z.object({ first: z.number().int(), last: z.number().int() }).strict()
    .refine((y) => y.first <= y.last, { message: "first must not be after last" })
    .optional().describe("the years of the path (default: each series' first to last anchor)"),
  before: z.enum(["error", "hold"]).default("error").describe("years before a series' first anchor: an error, or hold the first value"),
  after: z.enum(["error", "hold"]).default("error").describe("years after a series' last anchor: an error, or hold the last value"),
  multiply: z.object({
    table: Name.describe("a yearly driver: its keys (a subset of the path's keys), year, and the column"),
    column: Name.describe("the driver column"),
    keys: z.array(Name).default([]).describe("the keys joining the driver to the path (besides year)"),
  }).strict().optional().describe("multiply every value by a yearly driver (e.g. per-capita targets × population)"),
  as: z.record(Name, Name).optional().describe("new names for value columns in the output, e.g. {per_capita: stock} when multiplied by population"),
  unit: UnitText.optional().describe("the unit of the resulting values (converted to the base unit; adds a unit column), e.g. t for a stock"),
});
type O = z.output<typeof Options> & { id: string };

function layout(input: TableSchema, o: O): { keys: string[]; values: string[] } {
  const keys = o.keys ?? input.keys.filter((k) => k !== "year");
  const values = o.values ?? input.columns.filter((c) => c.type === "DOUBLE" && !keys.includes(c.name) && c.name !== "year").map((c) => c.name);
  return { keys, values };
}

export const yearlyPathStep = defineStep({
  kind: "yearly-path",
  summary: "anchor-year values to yearly paths (linear, monotone cubic of Fritsch and Carlson, or step), optionally times a yearly driver",
  options: Options,
  reads: (o) => [{ table: o.input, option: "input", config: true }, ...(o.multiply ? [{ table: o.multiply.table, option: "multiply" }] : [])],
  outputs(ctx, o): OutputDecl[] {
    const input = ctx.schemaOf(o.input, "input");
    const { keys, values } = layout(input, o);
    const missing = hasColumns(input, [...keys, "year", ...values]);
    if (missing.length) ctx.fail("input", `table ${o.input} lacks column(s) ${missing.join(", ")}; it has ${input.columns.map((c) => c.name).join(", ")}`);
    if (!values.length) ctx.fail("values", `table ${o.input} has no DOUBLE column to interpolate; name them in values`);
    const badAs = Object.keys(o.as ?? {}).filter((k) => !values.includes(k));
    if (badAs.length) ctx.fail("as", `${badAs.join(", ")} not among the values (${values.join(", ")})`);
    if (o.multiply) {
      const d = ctx.schemaOf(o.multiply.table, "multiply");
      const m = hasColumns(d, [...o.multiply.keys, "year", o.multiply.column]);
      if (m.length) ctx.fail("multiply", `table ${o.multiply.table} lacks column(s) ${m.join(", ")}`);
      const notKeys = o.multiply.keys.filter((k) => !keys.includes(k));
      if (notKeys.length) ctx.fail("multiply", `keys ${notKeys.join(", ")} are not keys of the path (${keys.join(", ")})`);
    }
    const how = o.method === "monotone-cubic" ? "monotone cubic (Fritsch–Carlson)" : o.method === "linear" ? "linear interpolation" : "held values";
    const columns: ColumnDecl[] = [...keys.map((k) => keyFrom(input, k)), year(),
      ...values.map((v) => ({ name: o.as?.[v] ?? v, type: "DOUBLE", description: `${v} by year: ${how} between anchors${o.multiply ? `, times ${o.multiply.table}.${o.multiply.column}` : ""}`, ...(o.unit ? { unit: "unit-column" as const } : {}) })),
      ...(o.unit ? [unitColumn("the values")] : [])];
    return [{ name: o.id, role: "main", description: `yearly path of ${values.join(", ")} through the anchor years of ${o.input}`, keys: [...keys, "year"], columns }];
  },
  async check(ctx, o) {
    if (!ctx.tables.has(o.input)) return;
    const s = ctx.session;
    const input: TableSchema = { keys: ctx.tables.get(o.input)!.keys, columns: (await s.columns(o.input)).map((c) => ({ name: c.name, type: c.type, description: "" })) };
    const { keys } = layout(input, o);
    const dup = await s.all(`SELECT ${idents(keys)}${keys.length ? "," : ""} year, count(*) AS n FROM ${ident(o.input)} GROUP BY ALL HAVING count(*) > 1 ORDER BY ALL LIMIT 5`);
    if (dup.length) throw new DataError(`step ${o.id}: table ${o.input} gives several anchors for one series and year, e.g. ${dup.map((d) => JSON.stringify(d)).join("; ")}`);
    const { values } = layout(input, o);
    raise(o.id, `anchors table ${o.input} has empty cells`, await rowsWhere(ctx, o.input, [`year IS NULL`, ...values.map((v) => `${ident(v)} IS NULL OR NOT isfinite(CAST(${ident(v)} AS DOUBLE))`)].join(" OR "),
      `'an anchor needs a year and a finite value in ' || ${lit(values.join(", "))}`));
    if (o.years) {
      // Years outside a series' anchors, when they are not to be held: known from the anchors alone.
      const span = await s.all(`SELECT ${keys.length ? keys.map((k) => `CAST(${ident(k)} AS VARCHAR) AS ${ident(k)}`).join(", ") + "," : ""} min(year) AS y0, max(year) AS y1 FROM ${ident(o.input)} GROUP BY ALL ORDER BY ALL`);
      for (const r of span) {
        const name = keys.length ? describeSeries(keys, keys.map((k) => String(r[k]))) : "(the only series)";
        if (o.before === "error" && o.years.first < Number(r.y0)) throw new DataError(`step ${o.id}: series ${name} has its first anchor in ${r.y0}, after the path's first year ${o.years.first}; add an anchor or set before: hold`);
        if (o.after === "error" && o.years.last > Number(r.y1)) throw new DataError(`step ${o.id}: series ${name} has its last anchor in ${r.y1}, before the path's last year ${o.years.last}; add an anchor or set after: hold`);
      }
    }
  },
  async run(ctx, o) {
    const s = ctx.session;
    const input: TableSchema = { keys: ctx.requireTable(o.input, "input").keys, columns: (await s.columns(o.input)).map((c) => ({ name: c.name, type: c.type, description: "" })) };
    const { keys, values } = layout(input, o);
    await yearlyPathStep.check!(ctx, o);
    const sid = ident(`__${o.id}_sid`);
    await s.run(`CREATE OR REPLACE TEMP TABLE ${sid} AS SELECT CAST(row_number() OVER (ORDER BY ${keys.length ? idents(keys) : "1"}) - 1 AS INTEGER) AS sid${keys.length ? ", " + idents(keys) : ""}
      FROM (SELECT DISTINCT ${keys.length ? idents(keys) : "1 AS __one"} FROM ${ident(o.input)})`);
    const series = await s.all(`SELECT ${keys.map((k) => `CAST(${ident(k)} AS VARCHAR) AS ${ident(k)}`).join(", ") || "sid"} FROM ${sid} ORDER BY sid`);
    const { rows, columns } = await readColumns(s, `SELECT m.sid, CAST(i.year AS INTEGER), ${values.map((v) => `CAST(i.${ident(v)} AS DOUBLE)`).join(", ")}
      FROM ${ident(o.input)} i JOIN ${sid} m ${keys.length ? `USING (${idents(keys)})` : "ON TRUE"} ORDER BY m.sid, 2`, ["i32", "i32", ...values.map(() => "f64" as const)]);
    const sidCol = columns[0] as Int32Array;
    const yCol = columns[1] as Int32Array;
    const outSid: number[] = [];
    const outYear: number[] = [];
    const outVals: number[][] = values.map(() => []);
    let r = 0;
    while (r < rows) {
      const s0 = sidCol[r]!;
      let r1 = r;
      while (r1 < rows && sidCol[r1] === s0) r1++;
      const xs = Array.from(yCol.subarray(r, r1));
      const name = keys.length ? describeSeries(keys, keys.map((k) => String(series[s0]![k]))) : "(the only series)";
      for (const [vi, v] of values.entries()) {
        const ys = Array.from((columns[2 + vi] as Float64Array).subarray(r, r1));
        const bad = ys.findIndex((y) => !Number.isFinite(y));
        if (bad >= 0) throw new DataError(`step ${o.id}: series ${name}, year ${xs[bad]}: ${v} is missing or not finite in ${o.input}`);
        void v;
      }
      const first = o.years?.first ?? xs[0]!;
      const last = o.years?.last ?? xs[xs.length - 1]!;
      if (first < xs[0]! && o.before === "error") throw new DataError(`step ${o.id}: series ${name} has its first anchor in ${xs[0]}, after the path's first year ${first}; add an anchor or set before: hold`);
      if (last > xs[xs.length - 1]! && o.after === "error") throw new DataError(`step ${o.id}: series ${name} has its last anchor in ${xs[xs.length - 1]}, before the path's last year ${last}; add an anchor or set after: hold`);
      const yearsQ: number[] = [];
      for (let y = first; y <= last; y++) yearsQ.push(y);
      const inside = yearsQ.map((y) => Math.min(Math.max(y, xs[0]!), xs[xs.length - 1]!));
      for (const [vi] of values.entries()) {
        const ys = Array.from((columns[2 + vi] as Float64Array).subarray(r, r1));
        const path = interpolate(xs, ys, inside, o.method);
        for (const v of path) outVals[vi]!.push(v);
      }
      for (const y of yearsQ) {
        outSid.push(s0);
        outYear.push(y);
      }
      r = r1;
    }
    const raw = `__${o.id}_raw`;
    await writeColumns(s, raw, [{ name: "sid", kind: "i32", data: Int32Array.from(outSid) }, { name: "year", kind: "i32", data: Int32Array.from(outYear) },
      ...values.map((v, vi) => ({ name: `__v${vi}`, kind: "f64" as const, data: Float64Array.from(outVals[vi]!) }))], outSid.length);
    const factor = o.unit && isMassUnit(o.unit) ? massFactor(o.unit, ctx.pipeline.base_unit) : 1;
    const unitText = o.unit ? (isMassUnit(o.unit) ? ctx.pipeline.base_unit : PIECE) : null;
    const d = o.multiply;
    if (d) {
      const dk = [...d.keys, "year"];
      const gap = await s.all(`SELECT ${d.keys.map((k) => `m.${ident(k)}`).join(", ")}${d.keys.length ? "," : ""} r.year FROM ${ident(raw)} r JOIN ${sid} m USING (sid)
        ANTI JOIN ${ident(d.table)} p ON ${dk.map((k) => (k === "year" ? "p.year = r.year" : `p.${ident(k)} = m.${ident(k)}`)).join(" AND ")} ORDER BY ALL LIMIT 3`);
      if (gap.length) throw new DataError(`step ${o.id}: the driver ${d.table} has no ${d.column} for ${gap.map((g) => JSON.stringify(g)).join("; ")}; it must cover every series and year of the path`);
      const empty = await s.all(`SELECT ${dk.map((k) => `CAST(${ident(k)} AS VARCHAR) AS ${ident(k)}`).join(", ")} FROM ${ident(d.table)} WHERE ${ident(d.column)} IS NULL OR NOT isfinite(CAST(${ident(d.column)} AS DOUBLE)) LIMIT 3`);
      if (empty.length) throw new DataError(`step ${o.id}: the driver ${d.table} has an empty or non-finite ${d.column} for ${empty.map((g) => JSON.stringify(g)).join("; ")}; every series and year of the path needs a value`);
      const dupD = await s.all(`SELECT ${idents(dk)}, count(*) AS n FROM ${ident(d.table)} GROUP BY ALL HAVING count(*) > 1 LIMIT 1`);
      if (dupD.length) throw new DataError(`step ${o.id}: the driver ${d.table} has several rows for ${JSON.stringify(dupD[0])}`);
    }
    const valueExpr = (vi: number) => `${d ? `r.${ident(`__v${vi}`)} * CAST(p.${ident(d.column)} AS DOUBLE)` : `r.${ident(`__v${vi}`)}`}${factor !== 1 ? ` * ${factor}` : ""}`;
    await s.run(`CREATE OR REPLACE TABLE ${ident(o.id)} AS
      SELECT ${keys.map((k) => `m.${ident(k)}`).join(", ")}${keys.length ? "," : ""} CAST(r.year AS BIGINT) AS year, ${values.map((v, vi) => `${valueExpr(vi)} AS ${ident(o.as?.[v] ?? v)}`).join(", ")}
        ${unitText ? `, ${lit(unitText)} AS unit` : ""}
      FROM ${ident(raw)} r JOIN ${sid} m USING (sid)
        ${d ? `JOIN ${ident(d.table)} p ON ${[...d.keys.map((k) => `p.${ident(k)} = m.${ident(k)}`), "p.year = r.year"].join(" AND ")}` : ""}
      ORDER BY ${[...keys.map((k) => `m.${ident(k)}`), "year"].join(", ")}`);
    await s.run(`DROP TABLE ${ident(raw)}; DROP TABLE ${sid}`);
  },
});
