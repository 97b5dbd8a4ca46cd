/**
 * Applying a concordance (commodity → product × material) to value columns, with its audits:
 * shares per commodity sum to 1; mass in = mass out + unmapped, per key and year; unmapped
 * codes listed with their mass, never dropped. Shared by the `concordance` and
 * `apparent-consumption` step kinds. The input may be a view: it is scanned, never copied.
 */
import { duplicateKeys, invertedRanges, locatedRelation, raise, rowsWhere, type Problem } from "./config-table.js";
import { ident, idents, keyMap, lit } from "../engine/sql.js";
import type { StepContext } from "../steps/types.js";
import { nativeParts } from "./concordance-native.js";

export const CONCORDANCE_COLUMNS = ["commodity", "product", "material", "factor", "share", "unit_mass", "first_year", "last_year"] as const;
export const CONCORDANCE_REQUIRED = ["commodity", "product", "material", "factor"] as const;

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

/**
 * The concordance's own rules, checked before any step runs: values in range, no duplicate or
 * overlapping rows for one commodity, product and material, shares of each commodity summing to
 * 1 in every year a row covers (a classification may change between years: first_year and
 * last_year per row, inclusive, empty = open-ended), one unit mass per commodity and year.
 */
export async function checkConcordanceRows(ctx: StepContext, step: string, table: string): Promise<void> {
  const cols = await ctx.columnsOf(table);
  const has = (c: string) => cols.includes(c);
  const tol = ctx.pipeline.audit.share_tolerance;
  const p: Problem[] = [];
  p.push(...(await rowsWhere(ctx, table, `factor IS NULL OR NOT isfinite(CAST(factor AS DOUBLE)) OR factor < 0`,
    `'factor ' || coalesce(CAST(factor AS VARCHAR), '(empty)') || ' of commodity ' || commodity || '; accepted: a finite number ≥ 0'`)));
  if (has("share")) p.push(...(await rowsWhere(ctx, table, `share IS NOT NULL AND (NOT isfinite(CAST(share AS DOUBLE)) OR share < 0 OR share > 1)`,
    `'share ' || CAST(share AS VARCHAR) || ' of commodity ' || commodity || '; accepted: 0 to 1 (empty = 1)'`)));
  if (has("unit_mass")) p.push(...(await rowsWhere(ctx, table, `unit_mass IS NOT NULL AND (NOT isfinite(CAST(unit_mass AS DOUBLE)) OR unit_mass <= 0)`,
    `'unit_mass ' || CAST(unit_mass AS VARCHAR) || ' of commodity ' || commodity || '; accepted: a number > 0, or empty'`)));
  const tv = has("first_year") || has("last_year");
  const first = has("first_year") ? "first_year" : "NULL";
  const last = has("last_year") ? "last_year" : "NULL";
  if (has("first_year") && has("last_year")) p.push(...(await invertedRanges(ctx, table, "first_year", "last_year")));
  raise(step, `concordance table ${table} has invalid values`, p);
  raise(step, `concordance table ${table} has duplicate rows`, await duplicateKeys(ctx, table, ["commodity", "product", "material"],
    tv ? { first: has("first_year") ? "first_year" : null, last: has("last_year") ? "last_year" : null } : undefined));
  // Shares: evaluated at every year where the rows of a commodity change (piecewise constant between).
  const share = has("share") ? "coalesce(CAST(share AS DOUBLE), 1.0)" : "1.0";
  const located = await locatedRelation(ctx, table);
  const rel = `(SELECT CAST(commodity AS VARCHAR) AS commodity, ${share} AS share, ${has("unit_mass") ? "CAST(unit_mass AS DOUBLE)" : "NULL::DOUBLE"} AS unit_mass,
      CAST(${first} AS BIGINT) AS f, CAST(${last} AS BIGINT) AS l, __where FROM ${located})`;
  const bad = await ctx.session.all(`WITH r AS ${rel},
    pts AS (SELECT DISTINCT commodity, f AS y FROM r UNION SELECT DISTINCT commodity, l + 1 FROM r WHERE l IS NOT NULL UNION SELECT DISTINCT commodity, NULL FROM r),
    cov AS (SELECT p.commodity, p.y, sum(r.share) AS total, count(*) AS n, min(r.unit_mass) AS um0, max(r.unit_mass) AS um1, string_agg(r.__where, '; ' ORDER BY r.__where) AS rows
      FROM pts p JOIN r ON r.commodity = p.commodity AND (CASE WHEN p.y IS NULL THEN r.f IS NULL ELSE (r.f IS NULL OR r.f <= p.y) AND (r.l IS NULL OR r.l >= p.y) END)
      GROUP BY ALL)
    SELECT commodity, y, total, um0, um1, rows FROM cov WHERE abs(total - 1) > ${tol} OR um0 <> um1 ORDER BY commodity, y NULLS FIRST LIMIT 20`);
  raise(step, `concordance table ${table}: every commodity's shares must sum to 1 (± ${tol}, audit option share_tolerance) in each year, with one unit_mass`,
    bad.map((b) => ({
      where: `commodity ${b.commodity}${tv && has("first_year") ? (b.y == null ? ", years before any first_year" : `, from ${b.y}`) : ""} (${b.rows})`,
      message: Math.abs(Number(b.total) - 1) > tol ? `shares sum to ${Number(Number(b.total).toPrecision(12))}`
        : `unit_mass differs between rows (${Number(b.um0)} .. ${Number(b.um1)} ${ctx.pipeline.base_unit} per piece, after conversion from the source's unit)`,
    })));
}

export async function applyConcordance(ctx: StepContext, r: MappingRequest): Promise<{ unmappedRows: number }> {
  const s = ctx.session;
  const a = ctx.pipeline.audit;
  const base = lit(ctx.pipeline.base_unit);
  const ccols = await ctx.columnsOf(r.concordance);
  const hasShare = ccols.includes("share");
  const hasUnitMass = ccols.includes("unit_mass");
  // Time-varying rows (first_year, last_year): expanded to one row per year of the input, so
  // the join stays an equi-join on (commodity, year).
  const tv = ccols.includes("first_year") || ccols.includes("last_year");
  const hasUnit = (await ctx.columnsOf(r.input)).includes("unit");
  const conc = ident(`__conc_${r.step}`);
  const um = ident(`__um_${r.step}`);
  const massed = ident(`__massed_${r.step}`);
  const flags = r.flags ?? [];
  let years = "";
  if (tv) {
    const span = await s.one(`SELECT min(year) AS y0, max(year) AS y1 FROM ${ident(r.input)}`);
    const y0 = span.y0 == null ? 0 : Number(span.y0);
    const y1 = span.y1 == null ? -1 : Number(span.y1);
    const f = ccols.includes("first_year") ? "c.first_year" : "NULL";
    const l = ccols.includes("last_year") ? "c.last_year" : "NULL";
    years = ` JOIN range(${y0}, ${y1 + 1}) y(year) ON y.year >= coalesce(${f}, ${y0}) AND y.year <= coalesce(${l}, ${y1})`;
  }
  const yk = tv ? ["commodity", "year"] : ["commodity"];
  await s.run(`CREATE OR REPLACE TABLE ${conc} AS SELECT CAST(c.commodity AS VARCHAR) AS commodity, ${tv ? "CAST(y.year AS BIGINT) AS year," : ""} CAST(c.product AS VARCHAR) AS product,
      CAST(c.material AS VARCHAR) AS material, CAST(c.factor AS DOUBLE) AS factor, ${hasShare ? "coalesce(CAST(c.share AS DOUBLE), 1.0)" : "1.0"} AS share,
      ${hasUnitMass ? "CAST(c.unit_mass AS DOUBLE)" : "CAST(NULL AS DOUBLE)"} AS unit_mass,
      row_number() OVER (PARTITION BY CAST(c.commodity AS VARCHAR)${tv ? ", y.year" : ""} ORDER BY CAST(c.product AS VARCHAR), CAST(c.material AS VARCHAR), c.factor, c.share) = 1 AS __first
    FROM ${ident(r.concordance)} c${years}`);

  await ctx.audits.check({
    step: r.step, check: "concordance-shares", severity: "error", unit: "1",
    items: `SELECT ${keyMap(["commodity"])} AS keys, ${tv ? "year" : "NULL"} AS year, ${ctx.exact.sum("share")} AS observed, 1.0 AS expected, ${a.share_tolerance} AS tolerance,
      'shares of commodity ' || commodity || ${tv ? `' in ' || year ||` : ""} ' sum to ' || ${ctx.exact.sum("share")} || ', not 1' AS message FROM ${conc} GROUP BY ${idents(yk)}`,
    failMessage: "shares do not sum to 1",
  });
  if (hasUnitMass) {
    await ctx.audits.check({
      step: r.step, check: "concordance-unit-mass", severity: "error", unit: "kg per piece",
      items: `SELECT ${keyMap(["commodity"])} AS keys, ${tv ? "year" : "NULL"} AS year, max(unit_mass) AS observed, min(unit_mass) AS expected, 0 AS tolerance,
        'commodity ' || commodity || ' has different unit_mass values (' || min(unit_mass) || ' .. ' || max(unit_mass) || ')' AS message
        FROM ${conc} WHERE unit_mass IS NOT NULL GROUP BY ${idents(yk)}`,
      failMessage: "unit_mass differs between rows of one commodity",
    });
  }
  // Commodity ids (__cid) for the native sums (concordance-native.ts).
  await s.run(`CREATE OR REPLACE TABLE ${um} AS SELECT *${tv ? "" : ", CAST(row_number() OVER (ORDER BY commodity) - 1 AS INTEGER) AS __cid"} FROM (
      SELECT ${idents(yk)}, max(unit_mass) AS unit_mass FROM ${conc} GROUP BY ${idents(yk)})`);

  // Input rows in mass (pieces × unit mass), as a view; rows that cannot be mapped get a reason.
  const g = r.groupKeys;
  const gl = (p: string) => g.map((k) => `${p}${ident(k)}`).join(", ") + (g.length ? ", " : "");
  const isPiece = hasUnit ? `i.unit = 'piece'` : "FALSE";
  const L = r.long;
  const massedValues = L
    ? `i.${ident(L.kind)} AS __kind, CASE WHEN ${isPiece} THEN i.${ident(L.value)} * u.unit_mass ELSE i.${ident(L.value)} END AS __value, i.${ident(L.value)} AS __orig_value,
      ${ctx.exact.units(`coalesce(CASE WHEN ${isPiece} THEN i.${ident(L.value)} * u.unit_mass ELSE i.${ident(L.value)} END, 0)`)} AS __units`
    : `${r.values.map((v) => `CASE WHEN ${isPiece} THEN i.${ident(v)} * u.unit_mass ELSE i.${ident(v)} END AS ${ident(v)}`).join(", ")},
      ${r.values.map((v) => `i.${ident(v)} AS ${ident("__orig_" + v)}`).join(", ")}`;
  await s.run(`CREATE OR REPLACE VIEW ${massed} AS
    SELECT ${gl("i.")}CAST(i.commodity AS VARCHAR) AS commodity, i.year,
      ${massedValues},
      ${flags.map((f) => `i.${ident(f)}, `).join("")}
      ${hasUnit ? "i.unit" : base} AS unit, (${isPiece} AND u.unit_mass IS NULL) AS __nomass, ${tv ? "NULL" : "u.__cid"} AS __cid,
      CASE WHEN u.commodity IS NULL THEN ${lit(tv ? "commodity not in the concordance for this year" : "commodity not in the concordance")}
           WHEN ${isPiece} AND u.unit_mass IS NULL THEN 'counted in pieces but the concordance gives no unit_mass' END AS reason
    FROM ${ident(r.input)} i LEFT JOIN ${um} u ON u.commodity = CAST(i.commodity AS VARCHAR)${tv ? " AND u.year = i.year" : ""}`);

  const outKeys = r.outputKeys ?? [...g, "product", "material"];
  // One pass over the input for the output and the conservation audit: every input row joined
  // to its concordance rows (an unmapped row once, without), summed in exact units per output
  // keys, group keys and year; the output (per output keys and year) and the conservation
  // table (per group keys and year) are then sums of those sums, still exact. The mass in
  // counts each input row once (__once: its first concordance row, or none).
  const extraKeys = outKeys.filter((k) => !g.includes(k));
  const joined = `(SELECT m.*, ${extraKeys.map((k) => `c.${ident(k)}, `).join("")}c.factor AS __factor, c.share AS __share, coalesce(c.__first, TRUE) AS __once
      ${L ? `, ${ctx.exact.units("m.__value * c.factor * c.share")} AS __mapped, ${ctx.exact.units("coalesce(m.__value, 0) * c.share")} AS __dist` : ""}
    FROM ${massed} m LEFT JOIN ${conc} c ON c.commodity = CASE WHEN m.reason IS NULL THEN m.commodity END${tv ? " AND c.year = m.year" : ""}) j`; // an equi-join (an extra condition in ON is far slower)
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
      `sum(CASE WHEN reason IS NULL THEN ${ctx.exact.units(`${ident(v)} * __factor * __share`)} END) AS ${ident("__m_" + v)}`,
      `sum(CASE WHEN reason IS NULL THEN ${ctx.exact.units(`coalesce(${ident(v)}, 0) * __share`)} END) AS ${ident("__d_" + v)}`,
      `sum(CASE WHEN __once AND NOT __nomass THEN ${ctx.exact.units(`coalesce(${ident(v)}, 0)`)} ELSE 0 END) AS ${ident("__i_" + v)}`,
      `sum(CASE WHEN __once AND reason IS NOT NULL AND NOT __nomass THEN ${ctx.exact.units(`coalesce(${ident(v)}, 0)`)} ELSE 0 END) AS ${ident("__u_" + v)}`,
    ].join(", ")).join(",\n      ");
  const native = L && !tv && flags.length <= 1 && await nativeParts(ctx, {
    step: r.step, input: r.input, massed: `__massed_${r.step}`, groupKeys: g, extraKeys, fine, values: r.values, flag: flags[0] ?? null,
    conc: `__conc_${r.step}`, um: `__um_${r.step}`, parts: `__parts_${r.step}`,
  });
  if (!native) await s.run(`CREATE OR REPLACE TEMP TABLE ${parts} AS
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
    SELECT ${idents(outKeys)}, year, ${r.values.map((v) => `${ctx.exact.total(part("m", v))} AS ${ident(v)}`).join(", ")}, ${base} AS unit
      ${flags.map((f) => `, bool_or(${ident(f)}) AS ${ident(f)}`).join("")}
    FROM ${parts} GROUP BY ${idents([...outKeys, "year"])} HAVING sum(__mapped_rows) > 0 ORDER BY ${idents([...outKeys, "year"])}`);

  // Conservation: per group keys and year, mass in = mass distributed by the shares + unmapped mass.
  const cons = ident(`__cons_${r.step}`);
  await s.run(`CREATE OR REPLACE TABLE ${cons} AS
    SELECT ${gl("")}year, ${r.values.map((v) => `${ctx.exact.total(part("i", v))} AS ${ident("in_" + v)}, ${ctx.exact.total(part("u", v))} AS ${ident("un_" + v)}, ${ctx.exact.total(part("d", v))} AS ${ident("out_" + v)}`).join(", ")},
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
  const mass = ctx.exact.sum(r.values.map((v) => `abs(coalesce(${ident(v)}, 0))`).join(" + "));
  await ctx.audits.check({
    step: r.step, check: "unmapped", severity: ctx.pipeline.audit.unmapped_severity,
    items: `SELECT ${keyMap(["commodity", "unit"])} AS keys, year, ${mass} AS observed, 0 AS expected, 0 AS tolerance,
      'commodity ' || commodity || ': ' || any_value(reason) || '; ' || ${mass} || ' ' || unit || ' kept in ' || ${lit(r.unmapped)} AS message
      FROM ${ident(r.unmapped)} GROUP BY commodity, unit, year`,
    failWhen: "TRUE",
    failMessage: "unmapped commodity",
  });
  // Guardrails against silent loss: the unmapped share of the mass per value, and products whose
  // goods could not be weighed (counted in pieces without a unit mass) in most of their rows.
  const unit = ctx.pipeline.base_unit;
  for (const v of r.values) {
    await ctx.audits.check({
      step: r.step, check: `unmapped-share:${v}`, severity: a.unmapped_limit_severity, unit: "1",
      items: `SELECT MAP {}::MAP(VARCHAR, VARCHAR) AS keys, NULL AS year,
          CASE WHEN ${ctx.exact.sum(`abs(${ident("in_" + v)})`)} > 0 THEN ${ctx.exact.sum(`abs(${ident("un_" + v)})`)} / ${ctx.exact.sum(`abs(${ident("in_" + v)})`)} ELSE 0 END AS observed, 0.0 AS expected,
          ${a.unmapped_max_share} AS tolerance,
          round(100 * CASE WHEN ${ctx.exact.sum(`abs(${ident("in_" + v)})`)} > 0 THEN ${ctx.exact.sum(`abs(${ident("un_" + v)})`)} / ${ctx.exact.sum(`abs(${ident("in_" + v)})`)} ELSE 0 END, 4) || ' % of the ${v} mass (' ||
          ${ctx.exact.sum(`abs(${ident("un_" + v)})`)} || ' ${unit} of ' || ${ctx.exact.sum(`abs(${ident("in_" + v)})`)} || ' ${unit}) is unmapped, above the limit of ' || ${lit(String(100 * a.unmapped_max_share))} || ' % (audit option unmapped_max_share); see ' || ${lit(r.unmapped)} AS message
        FROM ${cons}`,
      failWhen: "observed > tolerance",
      failMessage: "unmapped share above the limit",
    });
  }
  const nomass = await s.all(`SELECT DISTINCT commodity FROM ${ident(r.unmapped)} WHERE unit = 'piece' ORDER BY 1`);
  if (nomass.length) {
    const list = nomass.map((c) => lit(String(c.commodity))).join(", ");
    await ctx.audits.check({
      step: r.step, check: "unweighed-product", severity: a.unmapped_limit_severity, unit: "1",
      items: `WITH pc AS (SELECT DISTINCT product, commodity${tv ? ", year" : ""} FROM ${conc} WHERE commodity IN (${list})),
          rows AS (SELECT pc.product, count(*) FILTER (WHERE m.__nomass) AS lost, count(*) AS total
            FROM ${massed} m JOIN pc ON pc.commodity = m.commodity${tv ? " AND pc.year = m.year" : ""} GROUP BY pc.product),
          allrows AS (SELECT c.product, count(*) AS n FROM ${massed} m JOIN (SELECT DISTINCT product, commodity${tv ? ", year" : ""} FROM ${conc}) c
            ON c.commodity = m.commodity${tv ? " AND c.year = m.year" : ""} WHERE c.product IN (SELECT product FROM pc) GROUP BY c.product)
        SELECT MAP(['product'], [rows.product]) AS keys, NULL AS year, rows.lost / allrows.n AS observed, 0.0 AS expected, ${a.unweighed_max_share} AS tolerance,
          'product ' || rows.product || ': ' || rows.lost || ' of its ' || allrows.n || ' input rows are counted in pieces with no unit_mass in the concordance, so their mass is unknown and they are left out (limit ' || ${lit(String(100 * a.unweighed_max_share))} || ' % of the rows, audit option unweighed_max_share); give unit_mass' AS message
        FROM rows JOIN allrows USING (product)`,
      failWhen: "observed > tolerance",
      failMessage: "a product's goods could not be weighed",
    });
  }
  await s.run(`DROP VIEW ${massed}; DROP TABLE ${conc}; DROP TABLE ${um}; DROP TABLE ${cons}`);
  return { unmappedRows };
}
