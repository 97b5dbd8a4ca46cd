/**
 * `cohort-model`: inflow-driven or stock-driven cohort (dynamic stock) models per series, with
 * lifetimes matched by key and cohort, a stock in place (an initial stock, or the end state of
 * an earlier model this one continues), material composition of every cohort, and
 * cohort-resolved output on request. The parts of the step, by concern:
 *   options.ts  the options schema        inputs.ts   series, values, stock in place
 *   params.ts   lifetimes, curves, content tables (read, checked)
 *   groups.ts   lifetime groups (one survival matrix each)
 *   content.ts  material content by cohort
 *   compute.ts  the models, composition, cohort-resolved rows, end state
 *   outputs.ts  declared and written tables    audits.ts   the step's audits
 *   carry.ts    end states kept for continuing models
 */
import { ident } from "../../engine/sql.js";
import { defineStep } from "../types.js";
import { Options, type O, CONTENT_COLUMNS } from "./options.js";
import { checkParamColumns, checkParamTables, CurveCache, curveTable, LIFETIME_COLUMNS, paramRows } from "./params.js";
import { readInputs, sidTable } from "./inputs.js";
import { buildGroups } from "./groups.js";
import { compute } from "./compute.js";
import { declareOutputs, writeLifetimes, writeTables } from "./outputs.js";
import { byCohortAudit, lifetimeAudits, materialAudits, modelAudits } from "./audits.js";
import { hasColumns } from "../columns.js";
import { declareUncertainty, runUncertainty } from "./uncertainty.js";

/** The groups tables of the aggregate steps that sum this model's main table. */
function groupTables(o: O, pipeline: { steps: readonly { kind: string }[] }): string[] {
  const out = new Set<string>();
  for (const x of pipeline.steps) {
    const a = x as unknown as { kind: string; input?: string; groups?: string };
    if (a.kind === "aggregate" && a.input === o.id && a.groups) out.add(a.groups);
  }
  return [...out];
}

export const cohortModelStep = defineStep({
  kind: "cohort-model",
  summary: "inflow-driven or stock-driven cohort (dynamic stock) model per series, with lifetimes by key and cohort, a stock in place, composition by cohort",
  options: Options,
  reads: (o, pipeline) => [
    { table: o.input, option: "input" },
    { table: o.lifetimes, option: "lifetimes", config: true },
    ...(o.curves ? [{ table: o.curves, option: "curves", config: true }] : []),
    ...(o.initial_stock ? [{ table: o.initial_stock, option: "initial_stock" }] : []),
    ...(o.content ? [{ table: o.content, option: "content", config: true }] : []),
    // The end state of the model it continues (kept in memory; its main table marks the dependency).
    ...(o.continues ? [{ table: o.continues.step, option: "continues" }] : []),
    // With uncertainty, the draws are summed over the groups of the aggregate steps that read this model.
    ...(o.uncertainty ? groupTables(o, pipeline).map((table) => ({ table, option: "uncertainty", config: true })) : []),
  ],
  outputs(ctx, step) {
    const o = step as O;
    const input = ctx.schemaOf(o.input, "input");
    const has = input.columns.map((c) => c.name).join(", ");
    if (o.keys.includes("year")) ctx.fail("keys", "year is not a series key: every series runs over the years (give the other keys, e.g. [region, product])");
    const missingKeys = hasColumns(input, o.keys);
    if (missingKeys.length) ctx.fail("keys", `table ${o.input} has no column(s) ${missingKeys.join(", ")}; it has ${has}`);
    if (hasColumns(input, ["year"]).length) ctx.fail("input", `table ${o.input} lacks column(s) year; it has ${has}`);
    if (hasColumns(input, [o.value]).length) ctx.fail("value", `table ${o.input} has no column ${o.value}${o.value === "value" ? " (the default)" : ""}; it has ${has}`);
    checkParamColumns(ctx, o, o.lifetimes, "lifetimes", LIFETIME_COLUMNS, ["distribution"]);
    if (o.curves) {
      const c = hasColumns(ctx.schemaOf(o.curves, "curves"), ["curve", "age", "survival"]);
      if (c.length) ctx.fail("curves", `curves table ${o.curves} lacks column(s) ${c.join(", ")} (contract: curve, age, survival)`);
    }
    if (o.content) checkParamColumns(ctx, o, o.content, "content", CONTENT_COLUMNS, ["material", "content"]);
    if (o.initial_stock) {
      const need = hasColumns(ctx.schemaOf(o.initial_stock, "initial_stock"), [...o.keys, "value"]);
      if (need.length) ctx.fail("initial_stock", `table ${o.initial_stock} lacks column(s) ${need.join(", ")} (contract: the series keys, value, optional age)`);
    }
    if (o.continues) {
      if (o.initial_stock) ctx.fail("continues", "give either initial_stock or continues: a continued model's stock in place is the earlier model's end state");
      const from = ctx.pipeline.steps.find((x) => x.id === o.continues!.step);
      if (!from || from.kind !== "cohort-model") ctx.fail("continues", `${JSON.stringify(o.continues.step)} is not a cohort-model step of this file`);
      const fo = from as unknown as O;
      const ownIndex = ctx.pipeline.steps.findIndex((x) => x.id === o.id);
      if (ctx.pipeline.steps.findIndex((x) => x.id === fo.id) > ownIndex) ctx.fail("continues", `step ${fo.id} comes later in the file; a model continues an earlier one`);
      if (fo.keys.join(",") !== o.keys.join(",")) ctx.fail("continues", `step ${fo.id} has keys [${fo.keys.join(", ")}]; a continued model keeps them: [${o.keys.join(", ")}]`);
      if (fo.content && !o.content) ctx.fail("continues", `step ${fo.id} tracks material content; give content: here too, so the new cohorts carry theirs`);
    }
    return [...declareOutputs(ctx, o), ...declareUncertainty(ctx, o)];
  },
  async check(ctx, step) {
    await checkParamTables(ctx, step as O);
  },
  async run(ctx, step) {
    const o = step as O;
    const s = ctx.session;
    const inp = await readInputs(ctx, o);
    ctx.progress.info(`step ${o.id}: ${inp.n} series × ${inp.T} years (${inp.y0}–${inp.y1}), ${o.mode}${o.continues ? `, continuing ${o.continues.step}` : ""}`);
    const lt = await paramRows(s, o.lifetimes, o.keys);
    const curveTables = await curveTable(s, o.curves);
    const cache = new CurveCache(o, curveTables, inp.T + 1);
    const { groups, A } = buildGroups(o, inp, lt, cache);
    const content = o.content ? await paramRows(s, o.content, o.keys) : null;
    const materials = [...new Set([...(content?.rows.map((r) => String(r.raw.material)) ?? []), ...(inp.carried?.stock.materials ?? [])])].sort();
    const res = await compute(ctx, o, inp, groups, A, content, materials);
    const t = await writeTables(ctx, o, inp, res);
    if (o.uncertainty) {
      const rows = new Map(cache.used().map(([i, c]) => [c, i]));
      await runUncertainty(ctx, o, inp, groups, A, (c) => rows.get(c) ?? -1, lt, curveTables, content, materials, cache.length, res);
    }
    await modelAudits(ctx, o, inp, res, t.raw);
    const ltMeta = await writeLifetimes(ctx, o, cache.used(), lt.rows, lt.keyCols, Math.min(cache.length, inp.T + A));
    await lifetimeAudits(ctx, o, ltMeta, inp.T, inp.y0, inp.y1);
    if (t.matRaw && t.sumRaw && t.withContent) {
      await materialAudits(ctx, o, inp, res, { matRaw: t.matRaw, sumRaw: t.sumRaw, withContent: t.withContent });
    } else if (o.content) {
      // A content table with no material rows at all: an empty materials table, and the coverage audit.
      await s.run(`CREATE OR REPLACE TABLE ${ident(`${o.id}_materials`)} AS SELECT ${o.keys.map((k) => `m.${ident(k)}`).join(", ")}, CAST(NULL AS VARCHAR) AS material,
        CAST(NULL AS BIGINT) AS year, 0.0 AS inflow, 0.0 AS outflow, 0.0 AS stock, 0.0 AS stock_change, CAST(NULL AS VARCHAR) AS unit FROM ${ident(sidTable(o))} m WHERE FALSE`);
      await ctx.audits.note(o.id, "materials-coverage", "warning", "fail", `the content table ${o.content} has no rows: ${o.id}_materials is empty`, { items: inp.n, failed: inp.n });
    }
    if (res.byCohort) {
      const name = `${o.id}_by_cohort`;
      const files = await res.byCohort.finish();
      ctx.streamed(name, files);
      await byCohortAudit(ctx, o, inp, t.raw, res.byCohort.sumStock, res.byCohort.sumOutflow);
    }
    for (const x of [t.raw, ltMeta, t.matRaw, t.sumRaw, t.withContent]) if (x) await s.run(`DROP TABLE IF EXISTS ${ident(x)}`);
  },
});
