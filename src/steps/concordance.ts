/** `concordance`: map commodity codes to product × material (mass conserved, unmapped reported). */
import { z } from "zod";
import { Name } from "../spec/common.js";
import { DataError } from "../errors.js";
import { defineStep } from "./types.js";
import { applyConcordance } from "./mapping.js";

export const concordanceStep = defineStep({
  kind: "concordance",
  summary: "map commodity codes to product and material with factors and shares; audits shares, mass conservation, unmapped codes",
  options: z.object({
    input: Name.describe("table with commodity, year, the group keys and the value columns"),
    concordance: Name.describe("table with commodity, product, material, factor, share (default 1), unit_mass (optional)"),
    keys: z.array(Name).optional().describe("group keys kept besides product and material (default: the input's keys minus commodity and year)"),
    values: z.array(Name).min(1).default(["quantity"]).describe("value columns to map (default [quantity])"),
  }),
  reads: (o) => [o.input, o.concordance],
  async run(ctx, o) {
    const info = ctx.requireTable(o.input, "input");
    ctx.requireTable(o.concordance, "concordance");
    const cols = await ctx.columnsOf(o.input);
    const need = ["commodity", "year", ...o.values];
    const missing = need.filter((c) => !cols.includes(c));
    if (missing.length) throw new DataError(`step ${o.id}: input ${o.input} lacks column(s) ${missing.join(", ")}; it has ${cols.join(", ")}`);
    const keys = o.keys ?? info.keys.filter((k) => k !== "commodity" && k !== "year");
    await applyConcordance(ctx, { step: o.id, input: o.input, groupKeys: keys, values: o.values, concordance: o.concordance, output: o.id, unmapped: `${o.id}_unmapped` });
    return [
      { name: o.id, keys: [...keys, "product", "material", "year"] },
      { name: `${o.id}_unmapped`, keys: [...keys, "commodity", "year"] },
    ];
  },
});
