/** A cohort model's audits: balance, signs, the stock path, coverage, lifetimes, materials, cohort-resolved totals. */
import { ident, idents, keyMap, lit } from "../../engine/sql.js";
import { writeColumns } from "../../engine/handoff.js";
import { describeSeries } from "../../ops/param-match.js";
import type { StepContext } from "../types.js";
import type { Results } from "./compute.js";
import { sidTable, type Inputs } from "./inputs.js";
import type { O } from "./options.js";

export async function modelAudits(ctx: StepContext, o: O, inp: Inputs, res: Results, raw: string): Promise<void> {
  const a = ctx.pipeline.audit;
  const { y0, y1, n } = inp;
  const u = inp.unit;
  const inPlace = Boolean(inp.init || inp.carried);
  const sidT = ident(sidTable(o));
  const tol = (cols: string) => `${a.balance_rtol} * greatest(${cols}) + ${a.balance_atol}`;
  await balanceCheck(ctx, o.id, o.id, o.keys, "balance", inPlace);
  await ctx.audits.check({
    step: o.id, check: "stock-sign", severity: "error",
    items: `SELECT ${keyMap(o.keys)} AS keys, year, least(stock, 0.0) AS observed, 0.0 AS expected, ${a.balance_atol} AS tolerance,
      'negative stock ' || printf('%.10g', stock) || ' ${u}' AS message FROM ${ident(o.id)}`,
    failWhen: "observed < -tolerance", failMessage: "negative stock",
  });
  if (o.mode === "inflow-driven" && o.negative_inflow === "clamp") {
    await ctx.audits.fromItems({
      step: o.id, check: "negative-inflow", severity: a.negative_severity, items: n * inp.T, worst: 0,
      failing: inp.clamped.map((c) => ({
        keys: Object.fromEntries(o.keys.map((k, i) => [k, inp.keyValues[Math.floor(c.at / inp.T)]![i]!])), year: y0 + (c.at % inp.T),
        observed: c.value, expected: 0, tolerance: 0,
        message: `negative inflow ${fmt(c.value)} ${u} (e.g. re-exports beyond production and imports) set to 0: it does not enter the stock (negative_inflow: clamp)`,
      })),
    });
  } else if (o.mode === "inflow-driven") {
    await ctx.audits.check({
      step: o.id, check: "negative-inflow", severity: a.negative_severity,
      items: `SELECT ${keyMap(o.keys)} AS keys, year, least(inflow, 0.0) AS observed, 0.0 AS expected, 0.0 AS tolerance, 'negative inflow ' || printf('%.10g', inflow) || ' ${u} (e.g. negative apparent consumption) enters the stock as given' AS message FROM ${ident(o.id)}`,
      failWhen: "observed < 0", failMessage: "negative inflow",
    });
    if (inp.missing.length) {
      await ctx.audits.check({
        step: o.id, check: "coverage", severity: "warning",
        unit: "rows",
        items: `SELECT ${keyMap(o.keys, "m")} AS keys, y AS year, CASE WHEN i.year IS NULL THEN 1.0 ELSE 0.0 END AS observed, 0.0 AS expected, 0.0 AS tolerance, 'no inflow row for this series-year; taken as 0' AS message
          FROM ${sidT} m CROSS JOIN range(${y0}, ${y1 + 1}) r(y) LEFT JOIN ${ident(o.input)} i ON ${o.keys.map((k) => `i.${ident(k)} = m.${ident(k)}`).join(" AND ")} AND i.year = r.y`,
        failWhen: "observed > 0", failMessage: "missing series-year",
      });
    }
  } else {
    await ctx.audits.check(o.negative_inflow === "clamp"
      ? {
        step: o.id, check: "negative-inflow", severity: a.negative_severity,
        items: `SELECT ${keyMap(o.keys)} AS keys, year, unmet_stock_change AS observed, 0.0 AS expected, ${a.balance_atol} AS tolerance,
            'inflow clamped to 0: the stock stays ' || printf('%.10g', -unmet_stock_change) || ' ${u} above its path' AS message FROM ${ident(o.id)}`,
        failMessage: "negative inflow clamped",
      }
      : {
        step: o.id, check: "negative-inflow", severity: a.negative_severity,
        items: `SELECT ${keyMap(o.keys)} AS keys, year, least(inflow, 0.0) AS observed, 0.0 AS expected, 0.0 AS tolerance,
            'negative inflow ' || printf('%.10g', inflow) || ' ${u} needed to follow the falling stock path (kept; negative_inflow = true)' AS message FROM ${ident(o.id)}`,
        failWhen: "observed < 0", failMessage: "negative inflow",
      });
    if (!inPlace) {
      await ctx.audits.check({
        step: o.id, check: "first-year-spike", severity: "warning",
        items: `SELECT ${keyMap(o.keys)} AS keys, year, stock_target AS observed, 0.0 AS expected, 0.0 AS tolerance,
          'the stock path starts at ' || printf('%.10g', stock_target) || ' ${u} with no stock in place: the whole stock enters as first-year inflow (a spike); give initial_stock or continues' AS message
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
  const keysOf = (values: string[]) => Object.fromEntries(o.keys.map((k, i) => [k, values[i]!]));
  if (inp.init) {
    const failing = [];
    for (let sid = 0; sid < n; sid++) if (res.tooOld[sid]! > 0) {
      failing.push({ keys: keysOf(inp.keyValues[sid]!), year: y0, observed: res.tooOld[sid]!, expected: 0, tolerance: 0,
        message: `${fmt(res.tooOld[sid]!)} ${u} of the stock in place is older than its lifetime distribution allows and leaves in ${y0}` });
    }
    await ctx.audits.fromItems({ step: o.id, check: "initial-stock-age", severity: "warning", items: n, worst: 0, failing });
  }
  if (inp.carried) {
    const c = inp.carried;
    const failing = c.orphans.map((j) => {
      let left = 0;
      for (let a2 = 0; a2 < c.stock.A; a2++) left += c.stock.amounts[j * c.stock.A + a2]!;
      return { keys: keysOf(c.stock.keyValues[j]!), year: c.stock.year, observed: left, expected: 0, tolerance: 0,
        message: `${fmt(left)} ${u} in use at the end of ${c.stock.year} in step ${c.stock.step}, but the series is not in ${o.input}: its stock would vanish` };
    });
    await ctx.audits.fromItems({ step: o.id, check: "continuation-coverage", severity: "error", items: c.stock.keyValues.length, worst: 0, failing });
  }
  void raw;
}

export async function balanceCheck(ctx: StepContext, step: string, table: string, keys: string[], check: string, inPlace: boolean): Promise<void> {
  const a = ctx.pipeline.audit;
  await ctx.audits.check({
    step, check, severity: "error",
    items: `SELECT ${keyMap(keys)} AS keys, year, stock - coalesce(lag(stock) OVER w, ${inPlace ? "stock - stock_change" : "0"}) AS observed, inflow - outflow AS expected,
      ${a.balance_rtol} * greatest(abs(stock), abs(inflow), abs(outflow)) + ${a.balance_atol} AS tolerance, NULL AS message
      FROM ${ident(table)} WINDOW w AS (PARTITION BY ${idents(keys)} ORDER BY year)`,
    failMessage: "stock change ≠ inflow − outflow",
  });
}

export async function lifetimeAudits(ctx: StepContext, o: O, ltMeta: string, T: number, y0: number, y1: number): Promise<void> {
  const a = ctx.pipeline.audit;
  await ctx.audits.check({
    step: o.id, check: "lifetime-below-zero", severity: a.lifetime_severity, unit: "1",
    items: `SELECT MAP(['lifetime_row'], [CAST(lifetime_row AS VARCHAR)]) AS keys, NULL AS year, below_zero AS observed, 0.0 AS expected, ${a.below_zero_threshold} AS tolerance,
      'lifetime row ' || lifetime_row || ' (' || distribution || '): ' || round(100 * below_zero, 3) || ' % of each cohort falls below age 0 and leaves in its year of entry' AS message
      FROM ${ident(ltMeta)}`,
    failMessage: "mass below age 0",
  });
  await ctx.audits.check({
    step: o.id, check: "lifetime-beyond-horizon", severity: a.lifetime_severity, unit: "1",
    items: `SELECT MAP(['lifetime_row'], [CAST(lifetime_row AS VARCHAR)]) AS keys, NULL AS year, survival AS observed, 0.0 AS expected, ${a.beyond_horizon_threshold} AS tolerance,
      'lifetime row ' || lifetime_row || ': ' || round(100 * survival, 2) || ' % of a cohort entering in ' || greatest(coalesce(first_cohort, ${y0}), ${y0}) || ' is still in stock at the end of ${y1}; its outflow falls beyond the horizon' AS message
      FROM ${ident(`${o.id}_lifetimes`)} WHERE age = ${y1} - greatest(coalesce(first_cohort, ${y0}), ${y0}) AND coalesce(first_cohort, ${y0}) <= ${y1}`,
    failMessage: "mass beyond the horizon",
  });
}

export async function materialAudits(ctx: StepContext, o: O, inp: Inputs, res: Results, t: { matRaw: string; sumRaw: string; withContent: string }): Promise<void> {
  const a = ctx.pipeline.audit;
  const sidT = ident(sidTable(o));
  await balanceCheck(ctx, o.id, `${o.id}_materials`, [...o.keys, "material"], "materials-balance", Boolean(inp.init || inp.carried));
  if (inp.unit !== "piece") {
    const u = inp.unit;
    await ctx.audits.fromItems({
      step: o.id, check: "content-total", severity: ctx.pipeline.audit.content_severity, unit: "1", items: res.contentTotals.items, worst: 0,
      failing: res.contentTotals.failing.map((f) => ({
        keys: Object.fromEntries(o.keys.map((k, i) => [k, inp.keyValues[f.sid]![i]!])), year: f.cohort, observed: f.total, expected: 1, tolerance: 1e-9,
        message: `the content of cohort ${f.cohort} sums to ${fmt(f.total)} ${u} of materials per ${u} of product: more material than the product's own mass (content table ${o.content})`,
      })),
    });
  }
  // Σ over materials = the model run once with the summed content, cohorts in place included (linearity of the model).
  await ctx.audits.check({
    step: o.id, check: "materials-total", severity: "error",
    items: `WITH t AS (SELECT sid, yi, sum(stock ORDER BY mi) AS st, max(abs(stock)) AS mx FROM ${ident(t.matRaw)} GROUP BY sid, yi)
      SELECT ${keyMap(o.keys, "m")} AS keys, t.yi + ${inp.y0} AS year, t.st AS observed, c.stock AS expected, ${a.balance_rtol} * greatest(abs(c.stock), t.mx) + ${a.balance_atol} AS tolerance,
        'sum of material stocks ≠ stock computed with the total content' AS message
      FROM t JOIN ${ident(t.sumRaw)} c USING (sid, yi) JOIN ${sidT} m USING (sid) SEMI JOIN ${ident(t.withContent)} h USING (sid)`,
    failMessage: "material totals differ",
  });
  const noContent = inp.n - [...res.hasContent].filter(Boolean).length;
  await ctx.audits.note(o.id, "materials-coverage", "warning", noContent > 0 ? "fail" : "pass",
    noContent > 0 ? `${noContent} series have no row in the content table and are not in ${o.id}_materials` : `${inp.n} series have content`,
    { items: inp.n, failed: noContent });
}

export async function byCohortAudit(ctx: StepContext, o: O, inp: Inputs, raw: string, sumStock: Float64Array, sumOutflow: Float64Array): Promise<void> {
  const a = ctx.pipeline.audit;
  const s = ctx.session;
  const { n, T } = inp;
  const sid = new Int32Array(n * T);
  const yi = new Int32Array(n * T);
  for (let x = 0; x < n; x++) for (let t = 0; t < T; t++) {
    sid[x * T + t] = x;
    yi[x * T + t] = t;
  }
  const sums = `__${o.id}_bcsums`;
  await writeColumns(s, sums, [{ name: "sid", kind: "i32", data: sid }, { name: "yi", kind: "i32", data: yi },
    { name: "st", kind: "f64", data: sumStock }, { name: "ou", kind: "f64", data: sumOutflow }], n * T);
  await ctx.audits.check({
    step: o.id, check: "by-cohort-total", severity: "error",
    items: `SELECT ${keyMap(o.keys, "m")} AS keys, r.yi + ${inp.y0} AS year, c.st + c.ou AS observed, r.stock + r.outflow AS expected,
        ${a.balance_rtol} * greatest(abs(r.stock), abs(r.outflow)) + ${a.balance_atol} AS tolerance,
        'cohort-resolved stock and outflow do not add up to the totals' AS message
      FROM ${ident(raw)} r JOIN ${ident(sums)} c USING (sid, yi) JOIN ${ident(sidTable(o))} m USING (sid)`,
    failMessage: "cohort-resolved totals differ",
  });
  await s.run(`DROP TABLE ${ident(sums)}`);
}

export { lit };

/** A number for a message: up to 10 significant digits, no float noise. */
export function fmt(x: number): string {
  return String(Number(x.toPrecision(10)));
}
