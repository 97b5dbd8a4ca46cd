/** `concordance`: map commodity codes to product × material (mass conserved, unmapped reported). */
import { z } from "zod";
import { Name } from "../spec/common.js";
import { defineStep, type OutputDecl, type PlanContext } from "./types.js";
import { applyConcordance, checkConcordanceRows, CONCORDANCE_REQUIRED } from "../ops/concordance-map.js";
import { hasColumns, keyFrom, mass, text, unitColumn, year } from "./columns.js";

const Options = z.object({
  input: Name.describe("table with commodity, year, the group keys and the value columns"),
  concordance: Name.describe("table with commodity, product, material, factor, share (default 1), unit_mass (optional), first_year and last_year (optional)"),
  keys: z.array(Name).optional().describe("group keys kept besides product and material (default: the input's keys minus commodity and year)"),
  values: z.array(Name).min(1).default(["quantity"]).describe("value columns to map (default [quantity])"),
});
type O = z.output<typeof Options> & { id: string };

/** Checks the concordance table's columns against its contract, at plan time. */
export function concordanceSchemaCheck(ctx: PlanContext, table: string, option: string): void {
  const missing = hasColumns(ctx.schemaOf(table, option), CONCORDANCE_REQUIRED);
  if (missing.length) ctx.fail(option, `concordance table ${table} lacks column(s) ${missing.join(", ")} (contract: ${CONCORDANCE_REQUIRED.join(", ")}; share, unit_mass, first_year, last_year optional)`);
}

function groupKeys(ctx: PlanContext, o: O): string[] {
  const input = ctx.schemaOf(o.input, "input");
  return o.keys ?? input.keys.filter((k) => k !== "commodity" && k !== "year");
}

export const concordanceStep = defineStep({
  kind: "concordance",
  summary: "map commodity codes to product and material with factors and shares; audits shares, mass conservation, unmapped codes",
  options: Options,
  reads: (o) => [{ table: o.input, option: "input" }, { table: o.concordance, option: "concordance", config: true }],
  outputs(ctx, o): OutputDecl[] {
    const input = ctx.schemaOf(o.input, "input");
    const missing = hasColumns(input, ["commodity", "year", ...o.values]);
    if (missing.length) ctx.fail("input", `table ${o.input} lacks column(s) ${missing.join(", ")}; it has ${input.columns.map((c) => c.name).join(", ")}`);
    concordanceSchemaCheck(ctx, o.concordance, "concordance");
    const keys = groupKeys(ctx, o);
    const absent = hasColumns(input, keys);
    if (absent.length) ctx.fail("keys", `table ${o.input} has no column(s) ${absent.join(", ")}`);
    const yearType = input.columns.find((c) => c.name === "year")!.type;
    return [
      {
        name: o.id, role: "main", description: `${o.values.join(", ")} of ${o.input} mapped to products and materials through ${o.concordance}`,
        keys: [...keys, "product", "material", "year"],
        columns: [...keys.map((k) => keyFrom(input, k)), text("product", "product the commodity's mass goes to"), text("material", "material of that product"),
          year(yearType), ...o.values.map((v) => mass(v, `${v} mapped: mass × factor × share`)), unitColumn()],
      },
      {
        name: `${o.id}_unmapped`, role: "detail", description: `rows of ${o.input} the concordance could not map, with their mass and the reason`,
        keys: [...keys, "commodity", "year"],
        columns: [...keys.map((k) => keyFrom(input, k)), text("commodity", "commodity code"), year(yearType),
          ...o.values.map((v) => mass(v, `${v} left unmapped (in pieces where the unit mass is missing)`)), unitColumn("the values (piece where no unit mass was given)"),
          text("reason", "why the row could not be mapped")],
      },
    ];
  },
  async check(ctx, o) {
    if (ctx.tables.has(o.concordance)) await checkConcordanceRows(ctx, o.id, o.concordance);
  },
  async run(ctx, o) {
    const info = ctx.requireTable(o.input, "input");
    const keys = o.keys ?? info.keys.filter((k) => k !== "commodity" && k !== "year");
    await applyConcordance(ctx, { step: o.id, input: o.input, groupKeys: keys, values: o.values, concordance: o.concordance, output: o.id, unmapped: `${o.id}_unmapped` });
  },
});
