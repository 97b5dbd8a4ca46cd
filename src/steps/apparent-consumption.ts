/**
 * `apparent-consumption`: production + imports − exports per keys and year (common practice,
 * no source), with optional concordance on the way in, mirror fill for reporters that did not
 * report, a negative-result policy, and the identity, sign and trade-asymmetry audits.
 */
import { z } from "zod";
import { ColumnMap, Name } from "../spec/common.js";
import { DataError } from "../errors.js";
import { ident, idents, keyMap, lit } from "../engine/sql.js";
import { defineStep, type OutputDecl } from "./types.js";
import { applyConcordance, checkConcordanceRows } from "../ops/concordance-map.js";
import { asymmetryItems } from "../ops/asymmetry.js";
import { concordanceSchemaCheck } from "./concordance.js";
import { flag, mass, text, unitColumn, year } from "./columns.js";

const PRODUCTION_ROLES = ["region", "commodity", "year", "quantity"] as const;
const TRADE_ROLES = ["reporter", "partner", "commodity", "flow", "year", "quantity"] as const;

const Options = z.object({
    production: Name.describe("production table: region, commodity, year, quantity (renamable with production_columns)"),
    trade: Name.describe("bilateral trade table: reporter, partner, commodity, flow, year, quantity"),
    concordance: Name.optional().describe("map commodity codes to product × material on the way in (same audits as the concordance step)"),
    keys: z.array(Name).min(1).optional().describe("output keys (default [region, product, material] with a concordance, else [region, commodity])"),
    mirror_fill: z.boolean().default(false).describe("for a reporter-year without any trade rows, use partners' reports of the opposite flow"),
    negative: z.enum(["keep", "zero", "flag"]).default("keep").describe("negative consumption: keep it, set it to zero, or keep it and mark it in a `negative` column"),
    flows: z.object({ import: z.string().default("import"), export: z.string().default("export") }).strict().optional()
      .describe("labels of the flow column (default import, export)"),
    production_columns: ColumnMap(PRODUCTION_ROLES).optional(),
    trade_columns: ColumnMap(TRADE_ROLES).optional(),
});

type O = z.output<typeof Options> & { id: string };

const roles = (o: O) => ({
  pc: { region: "region", commodity: "commodity", year: "year", quantity: "quantity", ...o.production_columns } as Record<string, string>,
  tc: { reporter: "reporter", partner: "partner", commodity: "commodity", flow: "flow", year: "year", quantity: "quantity", ...o.trade_columns } as Record<string, string>,
});

const available = (o: O) => (o.concordance ? ["region", "product", "material"] : ["region", "commodity"]);

export const apparentConsumptionStep = defineStep({
  kind: "apparent-consumption",
  summary: "production + imports − exports per keys and year, with concordance, mirror fill, negative policy and audits",
  options: Options,
  reads: (o) => [{ table: o.production, option: "production" }, { table: o.trade, option: "trade" },
    ...(o.concordance ? [{ table: o.concordance, option: "concordance", config: true }] : [])],
  outputs(ctx, o): OutputDecl[] {
    const { pc, tc } = roles(o);
    for (const [tbl, map, opt] of [[o.production, pc, "production"], [o.trade, tc, "trade"]] as const) {
      const cols = ctx.schemaOf(tbl, opt).columns.map((c) => c.name);
      const missing = Object.entries(map).filter(([, c]) => !cols.includes(c));
      if (missing.length) {
        ctx.fail(opt, `table ${tbl} lacks column(s) ${missing.map(([role, c]) => (role === c ? c : `${c} (for ${role})`)).join(", ")}; it has ${cols.join(", ")} (map them with ${opt}_columns)`);
      }
    }
    if (o.concordance) concordanceSchemaCheck(ctx, o.concordance, "concordance");
    const keys = o.keys ?? available(o);
    const unknownKeys = keys.filter((k) => !available(o).includes(k));
    if (unknownKeys.length) ctx.fail("keys", `keys ${unknownKeys.join(", ")} are not available; choose among ${available(o).join(", ")}`);
    const keyCol = (k: string) => text(k, k === "region" ? "region (the reporter, for trade)" : k === "commodity" ? "commodity code" : k);
    const out: OutputDecl[] = [{
      name: o.id, role: "main", description: "apparent consumption = production + imports − exports per keys and year (common practice)",
      keys: [...keys, "year"],
      columns: [...keys.map(keyCol), year(), mass("production", "production"), mass("imports", "imports (reported, or mirrored from partners' exports)"),
        mass("exports", "exports (reported, or mirrored from partners' imports)"), mass("consumption", `apparent consumption${o.negative === "zero" ? " (negative results set to 0)" : ""}`),
        unitColumn(), flag("mirrored", "some of the trade in this row was filled from partners' reports (mirror statistics)"),
        ...(o.negative === "flag" ? [flag("negative", "apparent consumption is negative (kept)")] : [])],
    }];
    if (o.concordance) {
      out.push({
        name: `${o.id}_unmapped`, role: "detail", description: "production and trade rows the concordance could not map, with their mass and the reason",
        keys: ["region", "commodity", "year"],
        columns: [text("region", "region (the reporter, for trade)"), text("commodity", "commodity code"), year(), mass("production", "production left unmapped"),
          mass("imports", "imports left unmapped"), mass("exports", "exports left unmapped"), unitColumn("the values (piece where no unit mass was given)"),
          text("reason", "why the row could not be mapped")],
      });
    }
    return out;
  },
  async check(ctx, o) {
    if (o.concordance && ctx.tables.has(o.concordance)) await checkConcordanceRows(ctx, o.id, o.concordance);
  },
  async run(ctx, o) {
    const s = ctx.session;
    const a = ctx.pipeline.audit;
    ctx.requireTable(o.production, "production");
    ctx.requireTable(o.trade, "trade");
    if (o.concordance) ctx.requireTable(o.concordance, "concordance");
    const { pc, tc } = roles(o);
    const imp = o.flows?.import ?? "import";
    const exp = o.flows?.export ?? "export";
    const pCols = await ctx.columnsOf(o.production);
    const tCols = await ctx.columnsOf(o.trade);
    const pUnit = pCols.includes("unit") ? "unit" : lit(ctx.pipeline.base_unit);
    const tUnit = tCols.includes("unit") ? "unit" : lit(ctx.pipeline.base_unit);
    const id = o.id;
    const T = (n: string) => ident(`__${id}_${n}`);

    // Flow labels: anything else is bad input, named with its count.
    const badFlows = await s.all(`SELECT CAST(${ident(tc.flow!)} AS VARCHAR) AS f, count(*) AS n FROM ${ident(o.trade)}
      WHERE CAST(${ident(tc.flow!)} AS VARCHAR) NOT IN (${lit(imp)}, ${lit(exp)}) OR ${ident(tc.flow!)} IS NULL GROUP BY 1 ORDER BY 1 LIMIT 10`);
    if (badFlows.length) {
      throw new DataError(`step ${id}: trade table ${o.trade}, column ${tc.flow}: unknown flow label(s) ${badFlows.map((b) => `${JSON.stringify(b.f)} (${b.n} rows)`).join(", ")}; accepted: ${JSON.stringify(imp)}, ${JSON.stringify(exp)} (set flows: {import: …, export: …})`);
    }
    await s.run(`CREATE OR REPLACE ${o.mirror_fill ? "TABLE" : "VIEW"} ${T("trade")} AS
      SELECT CAST(${ident(tc.reporter!)} AS VARCHAR) AS reporter, CAST(${ident(tc.partner!)} AS VARCHAR) AS partner, CAST(${ident(tc.commodity!)} AS VARCHAR) AS commodity,
        CASE WHEN ${ident(tc.flow!)} = ${lit(imp)} THEN 'import' ELSE 'export' END AS flow, CAST(${ident(tc.year!)} AS BIGINT) AS year,
        CAST(${ident(tc.quantity!)} AS DOUBLE) AS quantity, ${tUnit} AS unit, FALSE AS mirrored
      FROM ${ident(o.trade)}`);
    let mirroredRows = 0;
    if (o.mirror_fill) {
      await s.run(`INSERT INTO ${T("trade")}
        SELECT t.partner, t.reporter, t.commodity, CASE t.flow WHEN 'import' THEN 'export' ELSE 'import' END, t.year, t.quantity, t.unit, TRUE
        FROM ${T("trade")} t
        WHERE NOT t.mirrored AND NOT EXISTS (SELECT 1 FROM ${T("trade")} r WHERE r.reporter = t.partner AND r.year = t.year AND NOT r.mirrored)`);
      mirroredRows = Number(await s.scalar(`SELECT count(*) FROM ${T("trade")} WHERE mirrored`));
      const ry = await s.one(`SELECT count(DISTINCT (reporter, year)) FILTER (WHERE mirrored) AS filled, count(DISTINCT (reporter, year)) AS total FROM ${T("trade")}`);
      const filled = Number(ry.filled);
      await ctx.audits.note(id, "mirror-fill", "warning", "pass",
        `${filled} of ${Number(ry.total)} reporter-years had no trade reports and were filled from partners' reports (${mirroredRows} mirrored rows, marked mirrored = true)`,
        { items: Number(ry.total), failed: 0 }, { observed: filled, unit: "reporter-years" });
    }

    // Trade asymmetry where both sides report (asymmetry.ts: pairs found by sorting numbered keys, or by grouping).
    ctx.progress.info(`step ${id}: trade-asymmetry audit`);
    const asym = await asymmetryItems(s, { trade: `__${id}_trade`, prefix: `__${id}_asym`, threshold: a.asymmetry_threshold, exact: ctx.exact });
    const ar = await ctx.audits.check({ step: id, check: "trade-asymmetry", severity: a.asymmetry_severity, items: asym.items, failMessage: "trade asymmetry" });
    await asym.cleanup();
    ctx.progress.info(`step ${id}: ${ar.items} pairs of reports compared (pairs found by ${asym.path}), ${ar.failed} beyond the threshold`);

    // One long view of flows: production rows and trade rows (reporter as region), one quantity
    // per row named by its kind (production, imports, exports), never copied.
    await s.run(`CREATE OR REPLACE VIEW ${T("flows")} AS
        SELECT CAST(${ident(pc.region!)} AS VARCHAR) AS region, CAST(${ident(pc.commodity!)} AS VARCHAR) AS commodity, CAST(${ident(pc.year!)} AS BIGINT) AS year, ${pUnit} AS unit,
          'production' AS kind, CAST(${ident(pc.quantity!)} AS DOUBLE) AS quantity, FALSE AS mirrored FROM ${ident(o.production)}
        UNION ALL
        SELECT reporter, commodity, year, unit, CASE WHEN flow = 'import' THEN 'imports' ELSE 'exports' END, quantity, mirrored
        FROM ${T("trade")}`);
    const keys = o.keys ?? available(o);
    if (o.concordance) {
      ctx.progress.info(`step ${id}: applying the concordance (table ${o.concordance}) and summing consumption`);
      await applyConcordance(ctx, {
        step: id, input: `__${id}_flows`, groupKeys: ["region"], values: ["production", "imports", "exports"], flags: ["mirrored"], long: { kind: "kind", value: "quantity" },
        concordance: o.concordance, outputKeys: keys, output: `__${id}_raw`, unmapped: `${id}_unmapped`,
      });
    } else {
      const pieces = await s.all(`SELECT DISTINCT CAST(commodity AS VARCHAR) AS c FROM ${T("flows")} WHERE unit = 'piece' ORDER BY 1 LIMIT 5`);
      if (pieces.length) {
        throw new DataError(`step ${id}: commodity ${pieces.map((p) => p.c).join(", ")} is counted in pieces; mixing pieces with ${ctx.pipeline.base_unit} needs a conversion: give a concordance with unit_mass`);
      }
      const ofKind = (k: string) => ctx.exact.total(`CASE WHEN kind = ${lit(k)} THEN __units ELSE 0 END`);
      await s.run(`CREATE OR REPLACE TABLE ${T("raw")} AS
        SELECT ${idents(keys)}, year, ${ofKind("production")} AS production, ${ofKind("imports")} AS imports, ${ofKind("exports")} AS exports,
          ${lit(ctx.pipeline.base_unit)} AS unit, bool_or(mirrored) AS mirrored
        FROM (SELECT *, ${ctx.exact.units("quantity")} AS __units FROM ${T("flows")}) GROUP BY ALL`);
    }
    await s.run(`ALTER TABLE ${T("raw")} ADD COLUMN consumption DOUBLE DEFAULT 0; UPDATE ${T("raw")} SET consumption = production + imports - exports`);

    // Identity, before the negative policy.
    await ctx.audits.check({
      step: id, check: "identity", severity: "error",
      items: `SELECT ${keyMap(keys)} AS keys, year, consumption AS observed, production + imports - exports AS expected,
        ${a.balance_rtol} * greatest(abs(production), abs(imports), abs(exports)) + ${a.balance_atol} AS tolerance, NULL AS message FROM ${T("raw")}`,
      failMessage: "consumption ≠ production + imports − exports",
    });
    await ctx.audits.check({
      step: id, check: "negative-consumption", severity: a.negative_severity,
      items: `SELECT ${keyMap(keys)} AS keys, year, least(consumption, 0.0) AS observed, 0.0 AS expected, 0.0 AS tolerance,
        'negative apparent consumption ' || printf('%.10g', consumption) || ' ${ctx.pipeline.base_unit} (production ' || printf('%.10g', production) || ', imports ' || printf('%.10g', imports) || ', exports ' || printf('%.10g', exports) || ')' ||
        ${lit(o.negative === "zero" ? "; set to 0 (negative: zero)" : o.negative === "flag" ? "; kept, negative = true" : "; kept")} AS message
        FROM ${T("raw")}`,
      failWhen: "observed < 0",
      failMessage: "negative apparent consumption",
    });
    const consumption = o.negative === "zero" ? "greatest(consumption, 0.0)" : "consumption";
    const flag = o.negative === "flag" ? ", consumption < 0 AS negative" : "";
    await s.run(`CREATE OR REPLACE TABLE ${ident(id)} AS
      SELECT ${idents(keys)}, year, production, imports, exports, ${consumption} AS consumption, ${lit(ctx.pipeline.base_unit)} AS unit, mirrored${flag}
      FROM ${T("raw")} ORDER BY ${idents(keys)}, year`);
    await s.run(`DROP VIEW ${T("flows")}; DROP ${o.mirror_fill ? "TABLE" : "VIEW"} ${T("trade")}; DROP TABLE ${T("raw")}`);
  },
});
