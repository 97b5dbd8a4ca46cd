/**
 * Applying a concordance (commodity → product × material) to value columns, with its audits:
 * shares per commodity sum to 1; mass in = mass out + unmapped, per key and year; unmapped
 * codes listed with their mass, never dropped. Shared by the `concordance` and
 * `apparent-consumption` step kinds.
 */
import { DataError } from "../errors.js";
import { exactSum, ident, idents, keyMap, lit } from "../engine/sql.js";
import type { StepContext } from "./types.js";

export const CONCORDANCE_COLUMNS = ["commodity", "product", "material", "factor", "share", "unit_mass"] as const;

export interface MappingRequest {
  step: string;
  /** Table with `commodity`, the group keys, `year`, the value columns and optionally `unit`. */
  input: string;
  /** Group keys other than commodity and year (e.g. region). */
  groupKeys: string[];
  values: string[];
  concordance: string;
  /** Output table: groupKeys…, product, material, year, values…, unit. */
  output: string;
  /** Table of unmapped rows: groupKeys…, commodity, year, values…, unit, reason. */
  unmapped: string;
  /** Value columns whose conservation is audited (default: all of `values`). */
  audited?: string[];
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
  const { hasShare, hasUnitMass } = await checkConcordanceTable(ctx, r.step, r.concordance);
  const inCols = await ctx.columnsOf(r.input);
  const hasUnit = inCols.includes("unit");
  const conc = `__conc_${r.step}`;
  await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(conc)} AS SELECT CAST(commodity AS VARCHAR) AS commodity, CAST(product AS VARCHAR) AS product,
      CAST(material AS VARCHAR) AS material, CAST(factor AS DOUBLE) AS factor, ${hasShare ? "coalesce(CAST(share AS DOUBLE), 1.0)" : "1.0"} AS share,
      ${hasUnitMass ? "CAST(unit_mass AS DOUBLE)" : "CAST(NULL AS DOUBLE)"} AS unit_mass
    FROM ${ident(r.concordance)}`);

  // Audit: shares per commodity sum to 1; one unit mass per commodity.
  await ctx.audits.check({
    step: r.step, check: "concordance-shares", severity: "error",
    items: `SELECT ${keyMap(["commodity"])} AS keys, NULL AS year, ${exactSum("share")} AS observed, 1.0 AS expected, ${a.share_tolerance} AS tolerance,
      'shares of commodity ' || commodity || ' sum to ' || ${exactSum("share")} || ', not 1' AS message FROM ${ident(conc)} GROUP BY commodity`,
    failMessage: "shares do not sum to 1",
  });
  if (hasUnitMass) {
    await ctx.audits.check({
      step: r.step, check: "concordance-unit-mass", severity: "error",
      items: `SELECT ${keyMap(["commodity"])} AS keys, NULL AS year, max(unit_mass) AS observed, min(unit_mass) AS expected, 0 AS tolerance,
        'commodity ' || commodity || ' has different unit_mass values (' || min(unit_mass) || ' .. ' || max(unit_mass) || ')' AS message
        FROM ${ident(conc)} WHERE unit_mass IS NOT NULL GROUP BY commodity`,
      failMessage: "unit_mass differs between rows of one commodity",
    });
  }
  const um = `__um_${r.step}`;
  await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(um)} AS SELECT commodity, max(unit_mass) AS unit_mass FROM ${ident(conc)} GROUP BY commodity`);

  // Input rows in mass (pieces × unit mass); rows that cannot be mapped get a reason.
  const g = r.groupKeys;
  const gSel = g.length ? idents(g) + ", " : "";
  const isPiece = hasUnit ? `i.unit = 'piece'` : "FALSE";
  const massed = `__massed_${r.step}`;
  await s.run(`CREATE OR REPLACE TEMP TABLE ${ident(massed)} AS
    SELECT ${g.map((k) => `i.${ident(k)}`).join(", ")}${g.length ? ", " : ""} CAST(i.commodity AS VARCHAR) AS commodity, i.year,
      ${r.values.map((v) => `CASE WHEN ${isPiece} THEN i.${ident(v)} * u.unit_mass ELSE i.${ident(v)} END AS ${ident(v)}`).join(", ")},
      ${r.values.map((v) => `i.${ident(v)} AS ${ident("__orig_" + v)}`).join(", ")},
      ${hasUnit ? "i.unit" : lit(ctx.pipeline.base_unit)} AS unit, (${isPiece} AND u.unit_mass IS NULL) AS __nomass,
      CASE WHEN u.commodity IS NULL THEN 'commodity not in the concordance'
           WHEN ${isPiece} AND u.unit_mass IS NULL THEN 'counted in pieces but the concordance gives no unit_mass' END AS reason
    FROM ${ident(r.input)} i LEFT JOIN ${ident(um)} u ON u.commodity = CAST(i.commodity AS VARCHAR)`);

  await s.run(`CREATE OR REPLACE TABLE ${ident(r.unmapped)} AS
    SELECT ${gSel}commodity, year, ${r.values.map((v) => `CASE WHEN __nomass THEN ${ident("__orig_" + v)} ELSE ${ident(v)} END AS ${ident(v)}`).join(", ")},
      CASE WHEN __nomass THEN 'piece' ELSE ${lit(ctx.pipeline.base_unit)} END AS unit, reason
    FROM ${ident(massed)} WHERE reason IS NOT NULL`);
  const outKeys = [...g, "product", "material", "year"];
  await s.run(`CREATE OR REPLACE TABLE ${ident(r.output)} AS
    SELECT ${g.map((k) => `m.${ident(k)}`).join(", ")}${g.length ? ", " : ""} c.product, c.material, m.year,
      ${r.values.map((v) => `${exactSum(`m.${ident(v)} * c.factor * c.share`)} AS ${ident(v)}`).join(", ")}, ${lit(ctx.pipeline.base_unit)} AS unit
    FROM ${ident(massed)} m JOIN ${ident(conc)} c ON c.commodity = m.commodity
    WHERE m.reason IS NULL
    GROUP BY ALL ORDER BY ${idents(outKeys)}`);

  // Conservation: per group keys and year, mass in = mass distributed by the shares + unmapped mass.
  for (const v of r.audited ?? r.values) {
    const keyCols = [...g, "year"];
    await ctx.audits.check({
      step: r.step, check: `concordance-conservation:${v}`, severity: "error",
      items: `WITH inp AS (SELECT ${gSel}year, ${exactSum(`coalesce(${ident(v)}, 0)`)} AS m FROM ${ident(massed)} WHERE NOT __nomass GROUP BY ALL),
        dist AS (SELECT ${g.map((k) => `m.${ident(k)}`).join(", ")}${g.length ? ", " : ""} m.year, ${exactSum(`coalesce(m.${ident(v)}, 0) * c.share`)} AS m
          FROM ${ident(massed)} m JOIN ${ident(conc)} c ON c.commodity = m.commodity WHERE m.reason IS NULL GROUP BY ALL),
        unm AS (SELECT ${gSel}year, ${exactSum(`coalesce(${ident(v)}, 0)`)} AS m FROM ${ident(massed)} WHERE reason IS NOT NULL AND NOT __nomass GROUP BY ALL)
        SELECT ${keyMap(g, "inp")} AS keys, inp.year, coalesce(dist.m, 0) + coalesce(unm.m, 0) AS observed, inp.m AS expected,
          ${a.conservation_rtol} * abs(inp.m) + ${a.balance_atol} AS tolerance, NULL AS message
        FROM inp LEFT JOIN dist USING (${idents(keyCols)}) LEFT JOIN unm USING (${idents(keyCols)})`,
      failMessage: `mass of ${v} not conserved through the concordance (mapped + unmapped ≠ input)`,
    });
  }
  // Unmapped codes, one audit row per code and year with its mass.
  const unmappedRows = Number(await s.scalar(`SELECT count(*) FROM ${ident(r.unmapped)}`));
  await ctx.audits.check({
    step: r.step, check: "unmapped", severity: ctx.pipeline.audit.unmapped_severity,
    items: `SELECT ${keyMap(["commodity", "unit"])} AS keys, year, ${exactSum(r.values.map((v) => `abs(coalesce(${ident(v)}, 0))`).join(" + "))} AS observed, 0 AS expected, 0 AS tolerance,
      'commodity ' || commodity || ': ' || any_value(reason) || '; ' || ${exactSum(r.values.map((v) => `abs(coalesce(${ident(v)}, 0))`).join(" + "))} || ' ' || unit || ' kept in ' || ${lit(r.unmapped)} AS message
      FROM ${ident(r.unmapped)} GROUP BY commodity, unit, year`,
    failWhen: "TRUE",
    failMessage: "unmapped commodity",
  });
  await s.run(`DROP TABLE ${ident(massed)}; DROP TABLE ${ident(conc)}; DROP TABLE ${ident(um)}`);
  return { unmappedRows };
}
