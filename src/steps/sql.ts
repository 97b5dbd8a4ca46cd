/** `sql`: a DuckDB SQL transform over earlier tables, with its declared output columns checked. */
import { z } from "zod";
import { Name } from "../spec/common.js";
import { DataError, PipelineError } from "../errors.js";
import { ident } from "../engine/sql.js";
import { defineStep } from "./types.js";

export const sqlStep = defineStep({
  kind: "sql",
  summary: "a transform written in DuckDB SQL over earlier tables (by name); its output columns are checked against `columns`",
  options: z.object({
    query: z.string().min(1).describe("a SELECT over sources and earlier step ids"),
    inputs: z.array(Name).default([]).describe("tables the query reads (checked to exist; orders the step after them)"),
    columns: z.array(Name).min(1).describe("the output columns, in order"),
    keys: z.array(Name).optional().describe("key columns: the published sort order (default: the non-DOUBLE columns)"),
  }),
  reads: (o) => o.inputs,
  async run(ctx, o) {
    for (const t of o.inputs) ctx.requireTable(t, "inputs");
    try {
      await ctx.session.run(`CREATE OR REPLACE TABLE ${ident(o.id)} AS ${o.query}`);
    } catch (e) {
      throw new PipelineError(`step ${o.id}: query failed: ${String((e as Error).message).split("\n")[0]}`);
    }
    const desc = await ctx.session.columns(o.id);
    const got = desc.map((d) => d.name);
    if (got.join(",") !== o.columns.join(",")) {
      throw new DataError(`step ${o.id}: the query returned columns ${got.join(", ")}; declared columns are ${o.columns.join(", ")}`);
    }
    const keys = o.keys ?? desc.filter((d) => !["DOUBLE", "FLOAT"].includes(d.type) && d.name !== "unit").map((d) => d.name);
    const ordered = [...keys.filter((k) => k !== "year"), ...(keys.includes("year") ? ["year"] : [])];
    return [{ name: o.id, keys: ordered }];
  },
});
