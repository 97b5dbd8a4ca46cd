/**
 * A cohort model's tables: declared before the run (names, keys, typed and described columns),
 * then written from the typed arrays in a fixed row order.
 */
import { ident, lit } from "../../engine/sql.js";
import { writeColumns, type OutColumn } from "../../engine/handoff.js";
import type { Curve } from "../../cohort/index.js";
import type { ColumnDecl, OutputDecl, PlanContext, StepContext } from "../types.js";
import { keyFrom, mass, text, unitColumn, years, flag, share } from "../columns.js";
import type { Results } from "./compute.js";
import { sidTable, type Inputs } from "./inputs.js";
import type { O } from "./options.js";
import type { ParamRow } from "./params.js";

const cohortYear = (name: string, description: string): ColumnDecl => ({ name, type: "BIGINT", unit: "year", description });

export function declareOutputs(ctx: PlanContext, o: O): OutputDecl[] {
  const input = ctx.schemaOf(o.input, "input");
  const keys = o.keys.map((k) => keyFrom(input, k));
  const lt = ctx.schemaOf(o.lifetimes, "lifetimes");
  const ltKeys = lt.columns.filter((c) => o.keys.includes(c.name)).map((c) => text(c.name, `${c.name} the lifetimes row applies to (empty: any)`));
  const main: ColumnDecl[] = [...keys, cohortYear("year", "calendar year"),
    mass("inflow", o.mode === "inflow-driven" ? "inflow to the stock (given)" : "inflow that keeps the stock on its path (solved)"),
    mass("outflow", "outflow leaving the stock in the year (end of life)"), mass("stock", "stock in use at the end of the year"),
    mass("stock_change", "stock minus the stock at the end of the year before"), unitColumn(),
    ...(o.indicators ? [years("mean_age_stock", "mean age of the stock at the end of the year (entry mid-year)"), years("mean_age_outflow", "mean age of the outflow")] : []),
    ...(o.mode === "stock-driven"
      ? [mass("stock_target", "the stock path given as input"), ...(o.negative_inflow === "clamp" ? [mass("unmet_stock_change", "stock path minus achieved stock where inflow was clamped to 0")] : []),
        flag("negative_inflow", "the stock path needs a negative inflow in this year")]
      : [])];
  const out: OutputDecl[] = [
    { name: o.id, role: "main", description: `${o.mode} cohort model of ${o.input} per ${o.keys.join(" × ")} (midpoint convention)`, keys: [...o.keys, "year"], columns: main },
    {
      name: `${o.id}_lifetimes`, role: "detail", description: "each lifetimes row used: its parameters, true mean, mass below age 0, and per age the leaving share and survival",
      keys: ["lifetime_row", "age"],
      columns: [{ name: "lifetime_row", type: "INTEGER", unit: "count", description: "row of the lifetimes table (from 1)" }, ...ltKeys,
        cohortYear("first_cohort", "first cohort the row applies to (empty: open)"), cohortYear("last_cohort", "last cohort the row applies to (empty: open)"),
        text("distribution", "lifetime distribution"), years("mean", "mean parameter as given"), years("sd", "sd parameter as given"),
        { name: "shape", type: "DOUBLE", unit: "1", description: "shape parameter as given" }, years("scale", "scale parameter as given"), text("curve", "curve name (distribution table)"),
        years("true_mean", "the distribution's true mean lifetime"), share("below_zero", "share of a cohort below age 0 (leaves in its year of entry)"),
        { name: "age", type: "INTEGER", unit: "years", description: "whole-year age a" }, share("leaving_share", "p(a): share of a cohort leaving at age a"),
        share("survival", "σ(a): share of a cohort left at the end of the year it reaches age a")],
    },
  ];
  if (o.content) {
    out.push({
      name: `${o.id}_materials`, role: "detail", description: "material inflow, outflow and stock: every cohort (those in place included) with its own content",
      keys: [...o.keys, "material", "year"],
      columns: [...keys, text("material", "material"), cohortYear("year", "calendar year"), mass("inflow", "material inflow"), mass("outflow", "material outflow"),
        mass("stock", "material stock at the end of the year"), mass("stock_change", "material stock change"), unitColumn()],
    });
  }
  if (o.by_cohort) {
    out.push({
      name: `${o.id}_by_cohort`, role: "detail", streamed: true,
      description: "stock and outflow by cohort (year of entry); cohorts in place before the first model year have inflow 0",
      keys: [...o.keys, "cohort", "year"],
      columns: [...keys, cohortYear("cohort", "cohort: year of entry"), cohortYear("year", "calendar year"), mass("inflow", "inflow of the cohort (in its year of entry)"),
        mass("outflow", "outflow of the cohort in the year"), mass("stock", "what is left of the cohort at the end of the year"), unitColumn()],
    });
  }
  return out;
}

const seriesYearColumns = (n: number, T: number) => {
  const sid = new Int32Array(n * T);
  const yi = new Int32Array(n * T);
  for (let s = 0; s < n; s++) for (let t = 0; t < T; t++) {
    sid[s * T + t] = s;
    yi[s * T + t] = t;
  }
  return { sid, yi };
};

/** The raw results table (sid, yi, …), the published main table, and the materials table. */
export async function writeTables(ctx: StepContext, o: O, inp: Inputs, res: Results): Promise<{ raw: string; sumRaw: string | null; withContent: string | null; matRaw: string | null }> {
  const s = ctx.session;
  const { n, T, y0 } = inp;
  const { sid, yi } = seriesYearColumns(n, T);
  const cols: OutColumn[] = [
    { name: "sid", kind: "i32", data: sid }, { name: "yi", kind: "i32", data: yi },
    { name: "inflow", kind: "f64", data: res.inflow }, { name: "outflow", kind: "f64", data: res.outflow },
    { name: "stock", kind: "f64", data: res.stock }, { name: "stock_change", kind: "f64", data: res.stockChange },
    { name: "mean_age_stock", kind: "f64", data: res.meanAgeStock }, { name: "mean_age_outflow", kind: "f64", data: res.meanAgeOutflow },
    { name: "given", kind: "f64", data: inp.value },
    ...(res.unmet ? [{ name: "unmet_stock_change", kind: "f64" as const, data: res.unmet }] : []),
  ];
  const raw = `__${o.id}_raw`;
  await writeColumns(s, raw, cols, n * T);
  const sidT = ident(sidTable(o));
  const keysOf = (alias: string) => o.keys.map((k) => `${alias}.${ident(k)}`).join(", ");
  const nanToNull = (c: string) => `CASE WHEN isnan(r.${c}) THEN NULL ELSE r.${c} END AS ${c}`;
  const extra = o.mode === "stock-driven" ? `, r.given AS stock_target${res.unmet ? ", r.unmet_stock_change" : ""}, r.inflow < 0 AS negative_inflow` : "";
  await s.run(`CREATE OR REPLACE TABLE ${ident(o.id)} AS
    SELECT ${keysOf("m")}, CAST(r.yi + ${y0} AS BIGINT) AS year, r.inflow, r.outflow, r.stock, r.stock_change, ${lit(inp.unit)} AS unit
      ${o.indicators ? `, ${nanToNull("mean_age_stock")}, ${nanToNull("mean_age_outflow")}` : ""}${extra}
    FROM ${ident(raw)} r JOIN ${sidT} m USING (sid) ORDER BY ${keysOf("m")}, year`);
  if (!res.mat) return { raw, sumRaw: null, withContent: null, matRaw: null };
  // Materials (only series with content).
  const M = res.materials.length;
  const rows = n * M * T;
  const sidM = new Int32Array(rows);
  const mi = new Int32Array(rows);
  const yiM = new Int32Array(rows);
  let k = 0;
  for (let sx = 0; sx < n; sx++) for (let m = 0; m < M; m++) for (let t = 0; t < T; t++) {
    sidM[k] = sx; mi[k] = m; yiM[k++] = t;
  }
  const matRaw = `__${o.id}_matraw`;
  await writeColumns(s, matRaw, [
    { name: "sid", kind: "i32", data: sidM }, { name: "mi", kind: "i32", data: mi }, { name: "yi", kind: "i32", data: yiM },
    { name: "inflow", kind: "f64", data: res.mat.inflow }, { name: "outflow", kind: "f64", data: res.mat.outflow }, { name: "stock", kind: "f64", data: res.mat.stock },
    { name: "stock_change", kind: "f64", data: res.mat.stockChange },
  ], rows);
  const matNames = `__${o.id}_matnames`;
  const list = `[${res.materials.map(lit).join(", ")}]`;
  await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(matNames)} AS SELECT CAST(i - 1 AS INTEGER) AS mi, m AS material FROM (SELECT unnest(${list}) AS m, generate_subscripts(${list}, 1) AS i)`);
  const withContent = `__${o.id}_hascontent`;
  const has = [...res.hasContent.keys()].filter((i) => res.hasContent[i]);
  await writeColumns(s, withContent, [{ name: "sid", kind: "i32", data: Int32Array.from(has) }], has.length);
  // Only the materials a series holds (a content row for it): no rows of zeros for impossible pairs.
  const held = `__${o.id}_held`;
  const hs: number[] = [];
  const hm: number[] = [];
  for (let x = 0; x < n; x++) for (let m = 0; m < M; m++) if (res.holds[x * M + m]) { hs.push(x); hm.push(m); }
  await writeColumns(s, held, [{ name: "sid", kind: "i32", data: Int32Array.from(hs) }, { name: "mi", kind: "i32", data: Int32Array.from(hm) }], hs.length);
  const matUnit = inp.unit === "piece" ? ctx.pipeline.base_unit : inp.unit;
  await s.run(`CREATE OR REPLACE TABLE ${ident(`${o.id}_materials`)} AS
    SELECT ${keysOf("m")}, n.material, CAST(r.yi + ${y0} AS BIGINT) AS year, r.inflow, r.outflow, r.stock, r.stock_change, ${lit(matUnit)} AS unit
    FROM ${ident(matRaw)} r JOIN ${sidT} m USING (sid) JOIN ${ident(matNames)} n USING (mi) SEMI JOIN ${ident(held)} h USING (sid, mi)
    ORDER BY ${keysOf("m")}, n.material, year`);
  await s.run(`DROP TABLE ${ident(held)}`);
  const sumRaw = `__${o.id}_sumraw`;
  await writeColumns(s, sumRaw, [{ name: "sid", kind: "i32", data: sid }, { name: "yi", kind: "i32", data: yi }, { name: "stock", kind: "f64", data: res.mat.sumCheck }], n * T);
  await s.run(`DROP TABLE ${ident(matNames)}`);
  return { raw, sumRaw, withContent, matRaw };
}

/** `<id>_lifetimes`: each lifetimes row used, with its curve by age. */
export async function writeLifetimes(ctx: StepContext, o: O, used: [number, Curve][], rows: ParamRow[], keyCols: string[], ages: number): Promise<string> {
  const s = ctx.session;
  const ltRows: number[] = [];
  const ltAge: number[] = [];
  const ltSigma: number[] = [];
  const ltLeave: number[] = [];
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
  const ltMeta = `__${o.id}_ltmeta`;
  await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(ltMeta)} (row INTEGER, lifetime_row INTEGER, ${keyCols.map((k) => `${ident(k)} VARCHAR`).join(", ")}${keyCols.length ? "," : ""}
    first_cohort BIGINT, last_cohort BIGINT, distribution VARCHAR, mean DOUBLE, sd DOUBLE, shape DOUBLE, scale DOUBLE, curve VARCHAR, true_mean DOUBLE, below_zero DOUBLE)`);
  const v = (x: unknown) => (x === null || x === undefined || x === "" ? "NULL" : lit(Number(x)));
  for (const [idx, c] of used) {
    const r = rows[idx]!.raw;
    await s.run(`INSERT INTO ${ident(ltMeta)} VALUES (${idx}, ${idx + 1}, ${keyCols.map((k) => (r[k] === null || r[k] === undefined || r[k] === "" ? "NULL" : lit(String(r[k])))).join(", ")}${keyCols.length ? "," : ""}
      ${v(r.first_cohort)}, ${v(r.last_cohort)}, ${lit(String(r.distribution))}, ${v(r.mean)}, ${v(r.sd)}, ${v(r.shape)}, ${v(r.scale)}, ${r.curve ? lit(String(r.curve)) : "NULL"},
      ${Number.isFinite(c.lifetime.mean) ? lit(c.lifetime.mean) : "NULL"}, ${lit(c.lifetime.belowZero)})`);
  }
  await s.run(`CREATE OR REPLACE TABLE ${ident(`${o.id}_lifetimes`)} AS
    SELECT m.* EXCLUDE (row), l.age, l.leaving_share, l.survival FROM ${ident(ltRaw)} l JOIN ${ident(ltMeta)} m USING (row) ORDER BY m.lifetime_row, l.age`);
  await s.run(`DROP TABLE ${ident(ltRaw)}`);
  return ltMeta;
}
