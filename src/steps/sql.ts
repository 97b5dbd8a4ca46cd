/**
 * `sql`: a transform written as one DuckDB SELECT over the tables it lists in `inputs`. The
 * query is parsed and bound before the run (plan/sandbox.ts): one SELECT, only the listed
 * tables, declared `columns` equal to what it returns. It then runs with DuckDB's access to
 * files, databases and extensions switched off.
 */
import { z } from "zod";
import { Name } from "../spec/common.js";
import { DataError } from "../errors.js";
import { ident } from "../engine/sql.js";
import { defineStep, type ColumnDecl } from "./types.js";

const Options = z.object({
  query: z.string().min(1).describe("one SELECT over the tables listed in inputs"),
  inputs: z.array(Name).default([]).describe("every table the query reads (sources and earlier steps' tables); it may read no other"),
  columns: z.array(Name).min(1).describe("the output columns, in order"),
  keys: z.array(Name).optional().describe("key columns: the published sort order (default: the columns that are not DOUBLE, FLOAT or unit)"),
  describe: z.record(Name, z.string()).optional().describe("a description of each output column, for the data dictionary"),
});

const UNITS: Record<string, ColumnDecl["unit"]> = { year: "year" };

export const sqlStep = defineStep({
  kind: "sql",
  summary: "one SELECT in DuckDB SQL over the tables listed in inputs; its output columns are checked against `columns` before the run",
  options: Options,
  reads: (o) => o.inputs.map((t) => ({ table: t, option: "inputs" })),
  async outputs(ctx, o) {
    const got = await ctx.bind(o.query, o.inputs, "query");
    const names = got.map((c) => c.name);
    const twice = names.filter((n, i) => names.indexOf(n) !== i);
    if (twice.length) ctx.fail("query", `the query returns the column ${[...new Set(twice)].join(", ")} more than once; give each output column its own name (… AS name)`);
    if (names.join(",") !== o.columns.join(",")) {
      ctx.fail("columns", `the query returns the columns ${names.join(", ")}; declared: ${o.columns.join(", ")} (declare exactly the query's columns, in order)`);
    }
    const unknownKeys = (o.keys ?? []).filter((k) => !names.includes(k));
    if (unknownKeys.length) ctx.fail("keys", `${unknownKeys.join(", ")} ${unknownKeys.length > 1 ? "are" : "is"} not among the query's columns (${names.join(", ")})`);
    const undescribed = Object.keys(o.describe ?? {}).filter((k) => !names.includes(k));
    if (undescribed.length) ctx.fail("describe", `${undescribed.join(", ")} not among the query's columns (${names.join(", ")})`);
    const keys = o.keys ?? got.filter((d) => !["DOUBLE", "FLOAT"].includes(d.type) && d.name !== "unit").map((d) => d.name);
    const ordered = [...keys.filter((k) => k !== "year"), ...(keys.includes("year") ? ["year"] : [])];
    const massLike = names.includes("unit");
    return [{
      name: o.id, role: "main", description: `the result of a query over ${o.inputs.join(", ") || "no table"}`, keys: ordered,
      columns: got.map((c) => ({
        name: c.name, type: c.type,
        description: o.describe?.[c.name] ?? (c.name === "unit" ? "unit of the mass columns" : `column ${c.name} of the query`),
        ...(UNITS[c.name] ? { unit: UNITS[c.name] } : massLike && c.type === "DOUBLE" ? { unit: "unit-column" as const } : {}),
      })),
    }];
  },
  async run(ctx, o) {
    for (const t of o.inputs) ctx.requireTable(t, "inputs");
    try {
      await ctx.session.run(`CREATE OR REPLACE TABLE ${ident(o.id)} AS ${o.query}`);
    } catch (e) {
      // The query was parsed and bound before the run: what fails now fails on the data (a cast, an overflow).
      throw new DataError(`step ${o.id}: the query failed on the data: ${String((e as Error).message).split("\n")[0]}`);
    }
  },
});
