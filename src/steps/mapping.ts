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
      ${hasUnitMass ? "CAST(unit_mass AS DOUBLE)" : "CAST(NULL AS DOUBLE)"} AS unit_mass,
      row_number() OVER (PARTITION BY CAST(commodity AS VARCHAR) ORDER BY CAST(product AS VARCHAR), CAST(material AS VARCHAR), factor, share) = 1 AS __first
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
    ? `i.${ident(L.kind)} AS __kind, CASE WHEN ${isPiece} THEN i.${ident(L.value)} * u.unit_mass ELSE i.${ident(L.value)} END AS __value, i.${ident(L.value)} AS __orig_value,
      ${exactUnits(`coalesce(CASE WHEN ${isPiece} THEN i.${ident(L.value)} * u.unit_mass ELSE i.${ident(L.value)} END, 0)`)} AS __units`
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

  const outKeys = r.outputKeys ?? [...g, "product", "material"];
  // One pass over the input for the output and the conservation audit: every input row joined
  // to its concordance rows (an unmapped row once, without), summed in exact units per output
  // keys, group keys and year; the output (per output keys and year) and the conservation
  // table (per group keys and year) are then sums of those sums, still exact. The mass in
  // counts each input row once (__once: its first concordance row, or none).
  const extraKeys = outKeys.filter((k) => !g.includes(k));
  const joined = `(SELECT m.*, ${extraKeys.map((k) => `c.${ident(k)}, `).join("")}c.factor AS __factor, c.share AS __share, coalesce(c.__first, TRUE) AS __once
      ${L ? `, ${exactUnits("m.__value * c.factor * c.share")} AS __mapped, ${exactUnits("coalesce(m.__value, 0) * c.share")} AS __dist` : ""}
    FROM ${massed} m LEFT JOIN ${conc} c ON c.commodity = CASE WHEN m.reason IS NULL THEN m.commodity END) j`; // an equi-join (an extra condition in ON is far slower)
  const fine = [...new Set([...outKeys, ...g])];
  const parts = ident(`__parts_${r.step}`);
  // Long input: the parts are also per kind, so each joined row adds to 4 sums, not 4 per value;
  // the per-value columns below are then picked from the kind's rows.
  const byKind = L ? ", __kind" : "";
  const sums = L
    ? [
      // mapped mass, and mass distributed by the shares: rows with a concordance row only (NULL otherwise, as if not joined)
      `sum(CASE WHEN reason IS NULL THEN __mapped END) AS __m`, `sum(CASE WHEN reason IS NULL THEN __dist END) AS __d`,
      // mass in, and its unmapped part (rows counted in pieces without a unit mass have no mass)
      `sum(CASE WHEN __once AND NOT __nomass THEN __units ELSE 0 END) AS __i`,
      `sum(CASE WHEN __once AND reason IS NOT NULL AND NOT __nomass THEN __units ELSE 0 END) AS __u`,
    ].join(", ")
    : r.values.map((v) => [
      `sum(CASE WHEN reason IS NULL THEN ${exactUnits(`${ident(v)} * __factor * __share`)} END) AS ${ident("__m_" + v)}`,
      `sum(CASE WHEN reason IS NULL THEN ${exactUnits(`coalesce(${ident(v)}, 0) * __share`)} END) AS ${ident("__d_" + v)}`,
      `sum(CASE WHEN __once AND NOT __nomass THEN ${exactUnits(`coalesce(${ident(v)}, 0)`)} ELSE 0 END) AS ${ident("__i_" + v)}`,
      `sum(CASE WHEN __once AND reason IS NOT NULL AND NOT __nomass THEN ${exactUnits(`coalesce(${ident(v)}, 0)`)} ELSE 0 END) AS ${ident("__u_" + v)}`,
    ].join(", ")).join(",\n      ");
  await s.run(`CREATE OR REPLACE TEMP TABLE ${parts} AS
    SELECT ${idents(fine)}, year${byKind}, ${sums},
      ${flags.map((f) => `bool_or(${ident(f)}) FILTER (WHERE reason IS NULL) AS ${ident(f)}, `).join("")}
      count(*) FILTER (WHERE reason IS NULL) AS __mapped_rows, count(*) FILTER (WHERE __once AND reason IS NOT NULL) AS __unmapped_rows
    FROM ${joined} GROUP BY ALL`);
  /**
   * Part column c ("m", "d", "i" or "u") of value v, to be summed over parts. Long: the kind's
   * parts, and 0 from the other kinds' parts; mapped and distributed mass stay NULL where a
   * part has no mapped rows, so that a sum is NULL exactly where it was with one part per key.
   */
  const part = (c: "m" | "d" | "i" | "u", v: string) => (L ? `CASE WHEN __kind = ${lit(v)} THEN __${c} ${c === "m" || c === "d" ? "WHEN __mapped_rows > 0 THEN 0" : "ELSE 0"} END` : ident(`__${c}_${v}`));
  await s.run(`CREATE OR REPLACE TABLE ${ident(r.output)} AS
    SELECT ${idents(outKeys)}, year, ${r.values.map((v) => `${exactTotal(part("m", v))} AS ${ident(v)}`).join(", ")}, ${base} AS unit
      ${flags.map((f) => `, bool_or(${ident(f)}) AS ${ident(f)}`).join("")}
    FROM ${parts} GROUP BY ${idents([...outKeys, "year"])} HAVING sum(__mapped_rows) > 0 ORDER BY ${idents([...outKeys, "year"])}`);

  // Conservation: per group keys and year, mass in = mass distributed by the shares + unmapped mass.
  const cons = ident(`__cons_${r.step}`);
  await s.run(`CREATE OR REPLACE TABLE ${cons} AS
    SELECT ${gl("")}year, ${r.values.map((v) => `${exactTotal(part("i", v))} AS ${ident("in_" + v)}, ${exactTotal(part("u", v))} AS ${ident("un_" + v)}, ${exactTotal(part("d", v))} AS ${ident("out_" + v)}`).join(", ")},
      sum(__unmapped_rows) AS __unmapped_rows
    FROM ${parts} GROUP BY ${idents([...g, "year"])}`);
  await s.run(`DROP TABLE ${parts}`);
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
