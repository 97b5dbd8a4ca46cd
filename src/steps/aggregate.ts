/** `aggregate`: sum a table over groups of one key column (regions → world, products → sectors), mass conserved. */
import { z } from "zod";
import { Name } from "../spec/common.js";
import { DataError } from "../errors.js";
import { exactSum, ident, idents, keyMap, lit } from "../engine/sql.js";
import { defineStep } from "./types.js";

export const aggregateStep = defineStep({
  kind: "aggregate",
  summary: "sum a table over groups of one key column defined by a table (member → group); audits mass conservation and members in no group",
  options: z.object({
    input: Name.describe("the table to aggregate"),
    groups: Name.describe("table with columns member and group (a member may belong to several groups)"),
    by: Name.default("region").describe("the key column whose values are grouped (default region)"),
    values: z.array(Name).min(1).optional().describe("columns to sum (default: every DOUBLE column of the input)"),
    keep_members: z.boolean().default(false).describe("also keep the members' own rows in the output"),
  }),
  reads: (o) => [o.input, o.groups],
  async run(ctx, o) {
    const s = ctx.session;
    const info = ctx.requireTable(o.input, "input");
    ctx.requireTable(o.groups, "groups");
    const desc = await s.columns(o.input);
    const cols = desc.map((d) => d.name);
    if (!cols.includes(o.by)) throw new DataError(`step ${o.id}: input ${o.input} has no column ${o.by} (option by); it has ${cols.join(", ")}`);
    const gcols = await ctx.columnsOf(o.groups);
    for (const c of ["member", "group"]) if (!gcols.includes(c)) throw new DataError(`step ${o.id}: groups table ${o.groups} lacks column ${c}; it has ${gcols.join(", ")}`);
    const values = o.values ?? desc.filter((d) => d.type === "DOUBLE" && !info.keys.includes(d.name)).map((d) => d.name);
    const missing = values.filter((v) => !cols.includes(v));
    if (missing.length) throw new DataError(`step ${o.id}: input ${o.input} lacks value column(s) ${missing.join(", ")}`);
    const others = cols.filter((c) => c !== o.by && !values.includes(c) && (info.keys.includes(c) || c === "unit"));
    const keys = info.keys.length ? info.keys : [o.by, ...others.filter((c) => c !== "unit")];
    const rest = others.filter((c) => c !== o.by);
    const sel = cols.filter((c) => c === o.by || values.includes(c) || rest.includes(c));
    const orderKeys = keys.filter((k) => sel.includes(k));
    await s.run(`CREATE OR REPLACE TABLE ${ident(o.id)} AS
      SELECT ${sel.map((c) => (c === o.by ? `CAST(g."group" AS VARCHAR) AS ${ident(o.by)}` : values.includes(c) ? `${exactSum(`i.${ident(c)}`)} AS ${ident(c)}` : `i.${ident(c)}`)).join(", ")}
      FROM ${ident(o.input)} i JOIN ${ident(o.groups)} g ON CAST(g.member AS VARCHAR) = CAST(i.${ident(o.by)} AS VARCHAR)
      GROUP BY ALL
      ${o.keep_members ? `UNION ALL SELECT ${sel.map((c) => (c === o.by ? `CAST(${ident(c)} AS VARCHAR)` : ident(c))).join(", ")} FROM ${ident(o.input)}` : ""}
      ORDER BY ${idents(orderKeys)}`);
    // Conservation: each group's total = the sum of its members' rows, per other key.
    const restKeys = rest.filter((c) => c !== "unit");
    for (const v of values) {
      await ctx.audits.check({
        step: o.id, check: `aggregate-conservation:${v}`, severity: "error",
        items: `WITH m AS (SELECT CAST(g."group" AS VARCHAR) AS grp, ${restKeys.map((k) => `i.${ident(k)}`).join(", ")}${restKeys.length ? "," : ""} ${exactSum(`i.${ident(v)}`)} AS x
            FROM ${ident(o.input)} i JOIN ${ident(o.groups)} g ON CAST(g.member AS VARCHAR) = CAST(i.${ident(o.by)} AS VARCHAR) GROUP BY ALL),
          o AS (SELECT CAST(${ident(o.by)} AS VARCHAR) AS grp, ${restKeys.map(ident).join(", ")}${restKeys.length ? "," : ""} ${exactSum(ident(v))} AS x
            FROM ${ident(o.id)} WHERE CAST(${ident(o.by)} AS VARCHAR) IN (SELECT CAST("group" AS VARCHAR) FROM ${ident(o.groups)}) GROUP BY ALL)
          SELECT ${keyMap([...restKeys.filter((k) => k !== "year")])} AS keys, ${restKeys.includes("year") ? "year" : "NULL"} AS year, o.x AS observed, m.x AS expected,
            ${ctx.pipeline.audit.conservation_rtol} * abs(m.x) + ${ctx.pipeline.audit.balance_atol} AS tolerance, 'group ' || grp || ': total ' || o.x || ' ≠ sum of members ' || m.x AS message
          FROM m JOIN o USING (grp${restKeys.length ? ", " + idents(restKeys) : ""})`,
        failMessage: "group total differs from the sum of its members",
      });
    }
    await ctx.audits.check({
      step: o.id, check: "aggregate-ungrouped", severity: "warning",
      items: `SELECT ${keyMap([o.by])} AS keys, NULL AS year, count(*) AS observed, 0 AS expected, 0 AS tolerance,
        ${lit(`${o.by} `)} || CAST(${ident(o.by)} AS VARCHAR) || ' belongs to no group in ' || ${lit(o.groups)} || ' (' || count(*) || ' rows not in any group total)' AS message
        FROM ${ident(o.input)} i WHERE CAST(i.${ident(o.by)} AS VARCHAR) NOT IN (SELECT CAST(member AS VARCHAR) FROM ${ident(o.groups)}) GROUP BY ${ident(o.by)}`,
      failWhen: "TRUE",
      failMessage: "member in no group",
    });
    return [{ name: o.id, keys: orderKeys }];
  },
});
