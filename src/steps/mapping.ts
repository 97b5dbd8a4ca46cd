/**
 * Applying a concordance (commodity → product × material) to value columns, with its audits:
 * shares per commodity sum to 1; mass in = mass out + unmapped, per key and year; unmapped
 * codes listed with their mass, never dropped. Shared by the `concordance` and
 * `apparent-consumption` step kinds. The input may be a view: it is scanned, never copied.
 */
import { DataError } from "../errors.js";
import { exactSum, exactTotal, exactUnits, ident, idents, keyMap, lit } from "../engine/sql.js";
import type { StepContext } from "./types.js";

export const CONCORDANCE_COLUMNS = ["commodity", "product", "material", "factor", "share", "unit_mass"] as const;

export interface MappingRequest {
  step: string;
  /** Table or view with `commodity`, the group keys, `year`, the value columns and optionally `unit`. */
  input: string;
  /** Group keys other than commodity and year (e.g. region). */
  groupKeys: string[];
  values: string[];
  /** Boolean columns carried to the output with bool_or (e.g. mirrored). */
  flags?: string[];
  concordance: string;
  /** Output keys (before year), a subset of groupKeys + product + material (default all of them). */
  outputKeys?: string[];
  /** Output table: outputKeys…, year, values…, unit, flags…. */
  output: string;
  /** Table of unmapped rows: groupKeys…, commodity, year, values…, unit, reason. */
  unmapped: string;
  /**
   * Long input: instead of one column per value, the input has a column `kind` naming the
   * value (one of `values`) and one column `value`. Each row is then rounded to exact-sum
   * units once, not once per value (the apparent-consumption flows: one quantity per row).
   */
  long?: { kind: string; value: string };
}

export async function checkConcordanceTable(ctx: StepContext, step: string, table: string): Promise<{ hasShare: boolean; hasUnitMass: boolean }> {
  const cols = await ctx.columnsOf(table);
  const missing = ["commodity", "product", "material", "factor"].filter((c) => !cols.includes(c));
  if (missing.length) {
    throw new DataError(`step ${step}: concordance table ${table} lacks column(s) ${missing.join(", ")}; it has ${cols.join(", ")} (contract: ${CONCORDANCE_COLUMNS.join(", ")}; share and unit_mass optional)`);
  }
  return { hasShare: cols.includes("share"), hasUnitMass: cols.includes("unit_mass") };
}

export async function applyConcordance(ctx: StepContext, r: MappingRequest): Promise<{ unmappedRows: number }> {
  const s = ctx.session;
  const a = ctx.pipeline.audit;
  const base = lit(ctx.pipeline.base_unit);
  const { hasShare, hasUnitMass } = await checkConcordanceTable(ctx, r.step, r.concordance);
  const hasUnit = (await ctx.columnsOf(r.input)).includes("unit");
  const conc = ident(`__conc_${r.step}`);
  const um = ident(`__um_${r.step}`);
  const massed = ident(`__massed_${r.step}`);
  const flags = r.flags ?? [];
  await s.run(`CREATE OR REPLACE TABLE ${conc} AS SELECT CAST(commodity AS VARCHAR) AS commodity, CAST(product AS VARCHAR) AS product,
      CAST(material AS VARCHAR) AS material, CAST(factor AS DOUBLE) AS factor, ${hasShare ? "coalesce(CAST(share AS DOUBLE), 1.0)" : "1.0"} AS share,
      ${hasUnitMass ? "CAST(unit_mass AS DOUBLE)" : "CAST(NULL AS DOUBLE)"} AS unit_mass
    FROM ${ident(r.concordance)}`);

  await ctx.audits.check({
    step: r.step, check: "concordance-shares", severity: "error",
    items: `SELECT ${keyMap(["commodity"])} AS keys, NULL AS year, ${exactSum("share")} AS observed, 1.0 AS expected, ${a.share_tolerance} AS tolerance,
      'shares of commodity ' || commodity || ' sum to ' || ${exactSum("share")} || ', not 1' AS message FROM ${conc} GROUP BY commodity`,
    failMessage: "shares do not sum to 1",
  });
  if (hasUnitMass) {
    await ctx.audits.check({
      step: r.step, check: "concordance-unit-mass", severity: "error",
      items: `SELECT ${keyMap(["commodity"])} AS keys, NULL AS year, max(unit_mass) AS observed, min(unit_mass) AS expected, 0 AS tolerance,
        'commodity ' || commodity || ' has different unit_mass values (' || min(unit_mass) || ' .. ' || max(unit_mass) || ')' AS message
        FROM ${conc} WHERE unit_mass IS NOT NULL GROUP BY commodity`,
      failMessage: "unit_mass differs between rows of one commodity",
    });
  }
  await s.run(`CREATE OR REPLACE TABLE ${um} AS SELECT commodity, max(unit_mass) AS unit_mass FROM ${conc} GROUP BY commodity`);

  // Input rows in mass (pieces × unit mass), as a view; rows that cannot be mapped get a reason.
  const g = r.groupKeys;
  const gl = (p: string) => g.map((k) => `${p}${ident(k)}`).join(", ") + (g.length ? ", " : "");
  const isPiece = hasUnit ? `i.unit = 'piece'` : "FALSE";
  const L = r.long;
  const massedValues = L
    ? `i.${ident(L.kind)} AS __kind, CASE WHEN ${isPiece} THEN i.${ident(L.value)} * u.unit_mass ELSE i.${ident(L.value)} END AS __value, i.${ident(L.value)} AS __orig_value`
    : `${r.values.map((v) => `CASE WHEN ${isPiece} THEN i.${ident(v)} * u.unit_mass ELSE i.${ident(v)} END AS ${ident(v)}`).join(", ")},
      ${r.values.map((v) => `i.${ident(v)} AS ${ident("__orig_" + v)}`).join(", ")}`;
  await s.run(`CREATE OR REPLACE VIEW ${massed} AS
    SELECT ${gl("i.")}CAST(i.commodity AS VARCHAR) AS commodity, i.year,
      ${massedValues},
      ${flags.map((f) => `i.${ident(f)}, `).join("")}
      ${hasUnit ? "i.unit" : base} AS unit, (${isPiece} AND u.unit_mass IS NULL) AS __nomass,
      CASE WHEN u.commodity IS NULL THEN 'commodity not in the concordance'
           WHEN ${isPiece} AND u.unit_mass IS NULL THEN 'counted in pieces but the concordance gives no unit_mass' END AS reason
    FROM ${ident(r.input)} i LEFT JOIN ${um} u ON u.commodity = CAST(i.commodity AS VARCHAR)`);
  /** Exact sum over rows of value v, from a per-row term: wide, the term of column v; long, the row's term when its kind is v. */
  const sumOf = (v: string, wideExpr: (col: string) => string, longUnits: string, cond = "") =>
    L ? exactTotal(`CASE WHEN __kind = ${lit(v)}${cond ? ` AND ${cond}` : ""} THEN ${longUnits} ELSE 0 END`)
      : exactSum(cond ? `CASE WHEN ${cond} THEN ${wideExpr(ident(v))} ELSE 0 END` : wideExpr(ident(v)));

  const outKeys = r.outputKeys ?? [...g, "product", "material"];
  // When the output keeps the group keys, the mass distributed by the shares is summed in the
  // same pass (hidden columns), so the conservation audit needs no second join.
  const inPass = g.every((k) => outKeys.includes(k));
  // Joined rows: long input gets its two rounded terms (mass mapped, mass distributed) once per row.
  const joined = `(SELECT m.*, ${outKeys.filter((k) => !g.includes(k)).map((k) => `c.${ident(k)}`).join(", ")}${outKeys.some((k) => !g.includes(k)) ? ", " : ""}c.factor AS __factor, c.share AS __share
      ${L ? `, ${exactUnits("m.__value * c.factor * c.share")} AS __mapped, ${exactUnits("coalesce(m.__value, 0) * c.share")} AS __dist` : ""}
    FROM ${massed} m JOIN ${conc} c ON c.commodity = m.commodity WHERE m.reason IS NULL) j`;
  const distCols = inPass ? r.values.map((v) => `, ${sumOf(v, (c) => `coalesce(${c}, 0) * __share`, "__dist")} AS ${ident("__dist_" + v)}`).join("") : "";
  await s.run(`CREATE OR REPLACE TABLE ${ident(r.output)} AS
    SELECT ${outKeys.map((k) => ident(k)).join(", ")}, year,
      ${r.values.map((v) => `${sumOf(v, (c) => `${c} * __factor * __share`, "__mapped")} AS ${ident(v)}`).join(", ")}, ${base} AS unit
      ${flags.map((f) => `, bool_or(${ident(f)}) AS ${ident(f)}`).join("")}${distCols}
    FROM ${joined}
    GROUP BY ALL ORDER BY ${idents([...outKeys, "year"])}`);

  // Conservation: per group keys and year, mass in = mass distributed by the shares + unmapped mass.
  const cons = ident(`__cons_${r.step}`);
  const keyCols = [...g, "year"];
  const inRows = L ? `(SELECT *, ${exactUnits("coalesce(__value, 0)")} AS __units FROM ${massed})` : massed;
  await s.run(`CREATE OR REPLACE TABLE ${cons} AS
    WITH inp AS (SELECT ${gl("")}year, ${r.values.map((v) => `${sumOf(v, (c) => `coalesce(${c}, 0)`, "__units", "NOT __nomass")} AS ${ident("in_" + v)}, ${sumOf(v, (c) => `coalesce(${c}, 0)`, "__units", "reason IS NOT NULL AND NOT __nomass")} AS ${ident("un_" + v)}`).join(", ")},
          count(*) FILTER (WHERE reason IS NOT NULL) AS __unmapped_rows
        FROM ${inRows} GROUP BY ALL),
      dist AS (${inPass
        ? `SELECT ${gl("")}year, ${r.values.map((v) => `${exactSum(ident("__dist_" + v))} AS ${ident("out_" + v)}`).join(", ")} FROM ${ident(r.output)} GROUP BY ALL`
        : `SELECT ${gl("")}year, ${r.values.map((v) => `${sumOf(v, (c) => `coalesce(${c}, 0) * __share`, "__dist")} AS ${ident("out_" + v)}`).join(", ")}
        FROM ${joined} GROUP BY ALL`})
    SELECT * FROM inp LEFT JOIN dist USING (${idents(keyCols)})`);
  if (inPass) for (const v of r.values) await s.run(`ALTER TABLE ${ident(r.output)} DROP COLUMN ${ident("__dist_" + v)}`);
  // Unmapped rows, kept with their mass; the input is scanned for them only when there are any.
  const anyUnmapped = Number(await s.scalar(`SELECT coalesce(sum(__unmapped_rows), 0) FROM ${cons}`)) > 0;
  const unmappedValue = (v: string) => L
    ? `CASE WHEN __kind = ${lit(v)} THEN (CASE WHEN __nomass THEN __orig_value ELSE __value END) ELSE 0.0 END`
    : `CASE WHEN __nomass THEN ${ident("__orig_" + v)} ELSE ${ident(v)} END`;
  await s.run(`CREATE OR REPLACE TABLE ${ident(r.unmapped)} AS
    SELECT ${gl("")}commodity, year, ${r.values.map((v) => `${unmappedValue(v)} AS ${ident(v)}`).join(", ")},
      CASE WHEN __nomass THEN 'piece' ELSE ${base} END AS unit, reason
    FROM ${massed} WHERE ${anyUnmapped ? "reason IS NOT NULL" : "FALSE"} ORDER BY ${idents([...g, "commodity", "year"])}`);

  for (const v of r.values) {
    await ctx.audits.check({
      step: r.step, check: `concordance-conservation:${v}`, severity: "error",
      items: `SELECT ${keyMap(g)} AS keys, year, coalesce(${ident("out_" + v)}, 0) + ${ident("un_" + v)} AS observed, ${ident("in_" + v)} AS expected,
          ${a.conservation_rtol} * abs(${ident("in_" + v)}) + ${a.balance_atol} AS tolerance, NULL AS message FROM ${cons}`,
      failMessage: `mass of ${v} not conserved through the concordance (mapped + unmapped ≠ input)`,
    });
  }
  const unmappedRows = Number(await s.scalar(`SELECT count(*) FROM ${ident(r.unmapped)}`));
  const mass = exactSum(r.values.map((v) => `abs(coalesce(${ident(v)}, 0))`).join(" + "));
  await ctx.audits.check({
    step: r.step, check: "unmapped", severity: ctx.pipeline.audit.unmapped_severity,
    items: `SELECT ${keyMap(["commodity", "unit"])} AS keys, year, ${mass} AS observed, 0 AS expected, 0 AS tolerance,
      'commodity ' || commodity || ': ' || any_value(reason) || '; ' || ${mass} || ' ' || unit || ' kept in ' || ${lit(r.unmapped)} AS message
      FROM ${ident(r.unmapped)} GROUP BY commodity, unit, year`,
    failWhen: "TRUE",
    failMessage: "unmapped commodity",
  });
  await s.run(`DROP VIEW ${massed}; DROP TABLE ${conc}; DROP TABLE ${um}; DROP TABLE ${cons}`);
  return { unmappedRows };
}
