/** `aggregate`: sum a table over groups of one key column (regions → world, products → sectors), mass conserved. */
import { z } from "zod";
import { Name } from "../spec/common.js";
import { ident, idents, keyMap, lit } from "../engine/sql.js";
import { defineStep, type ColumnDecl, type OutputDecl, type TableSchema } from "./types.js";
import { duplicateKeys, raise, rowsWhere } from "../ops/config-table.js";
import { hasColumns } from "./columns.js";

const Options = z.object({
  input: Name.describe("the table to aggregate"),
  groups: Name.describe("table with columns member and group (a member may belong to several groups)"),
  by: Name.default("region").describe("the key column whose values are grouped (default region)"),
  values: z.array(Name).min(1).optional().describe("columns to sum (default: every DOUBLE column of the input that is not a key)"),
  keep_members: z.boolean().default(false).describe("also keep the members' own rows in the output"),
});
type O = z.output<typeof Options> & { id: string };

/** Which input columns go where: the grouped key, the summed values, the other keys (and unit) kept. */
function layout(input: TableSchema, o: O): { values: string[]; rest: string[]; sel: ColumnDecl[]; keys: string[] } {
  const cols = input.columns.map((c) => c.name);
  const values = o.values ?? input.columns.filter((c) => c.type === "DOUBLE" && !input.keys.includes(c.name)).map((c) => c.name);
  const others = cols.filter((c) => c !== o.by && !values.includes(c) && (input.keys.includes(c) || c === "unit"));
  const keys = input.keys.length ? input.keys : [o.by, ...others.filter((c) => c !== "unit")];
  const rest = others.filter((c) => c !== o.by);
  const sel = input.columns
    .filter((c) => c.name === o.by || values.includes(c.name) || rest.includes(c.name))
    .map((c) => (c.name === o.by ? { ...c, type: "VARCHAR", description: `${o.by}, or the group it belongs to` } : values.includes(c.name) ? { ...c, type: "DOUBLE", description: `${c.description}, summed over the group's members` } : c));
  return { values, rest, sel, keys: keys.filter((k) => sel.some((c) => c.name === k)) };
}

/** The `<input>_uncertainty` table when the input is a cohort model with uncertainty keyed by `by`. */
function rangesOf(steps: readonly { id: string; kind: string }[], o: O): string | null {
  const p = steps.find((x) => x.id === o.input) as { kind: string; keys?: string[]; uncertainty?: unknown } | undefined;
  return p && p.kind === "cohort-model" && p.uncertainty && p.keys?.includes(o.by) ? `${o.input}_uncertainty` : null;
}

export const aggregateStep = defineStep({
  kind: "aggregate",
  summary: "sum a table over groups of one key column defined by a table (member → group); audits mass conservation and members in no group",
  options: Options,
  reads: (o) => [{ table: o.input, option: "input" }, { table: o.groups, option: "groups", config: true }],
  outputs(ctx, o): OutputDecl[] {
    const input = ctx.schemaOf(o.input, "input");
    if (hasColumns(input, [o.by]).length) ctx.fail("by", `table ${o.input} has no column ${o.by}; it has ${input.columns.map((c) => c.name).join(", ")}`);
    const g = hasColumns(ctx.schemaOf(o.groups, "groups"), ["member", "group"]);
    if (g.length) ctx.fail("groups", `groups table ${o.groups} lacks column(s) ${g.join(", ")} (contract: member, group)`);
    const { values, sel, keys } = layout(input, o);
    const missing = hasColumns(input, values);
    if (missing.length) ctx.fail("values", `table ${o.input} lacks value column(s) ${missing.join(", ")}`);
    if (!values.length) ctx.fail("values", `table ${o.input} has no DOUBLE column to sum; name the columns in values`);
    const notNumbers = input.columns.filter((c) => values.includes(c.name) && !/^(DOUBLE|FLOAT|REAL|DECIMAL.*|HUGEINT|BIGINT|INTEGER|SMALLINT|TINYINT|UBIGINT|UINTEGER|USMALLINT|UTINYINT)$/.test(c.type));
    if (notNumbers.length) ctx.fail("values", `${notNumbers.map((c) => `${c.name} (${c.type})`).join(", ")} cannot be summed; values are numeric columns`);
    const columns = sel.map((c) => (c.name === o.by ? { ...c, description: `group of ${o.by} (${o.groups}: member → group)`, groups: { table: o.groups, member: "member", group: "group" } } : c));
    const out: OutputDecl[] = [{ name: o.id, role: "main", description: `${o.input} summed over the groups of ${o.by} in ${o.groups}`, keys, columns }];
    // A cohort model's ranges, summed draw by draw over the same groups (the model computes them: uncertainty totals).
    const from = rangesOf(ctx.pipeline.steps, o);
    if (from) {
      const u = ctx.schemaOf(from, "input");
      out.push({
        name: `${o.id}_uncertainty`, role: "detail", description: `Monte Carlo ranges of ${o.id}: ${o.input}'s draws summed over the groups of ${o.by} in ${o.groups} draw by draw (never a sum of quantiles)`,
        keys: u.keys, columns: u.columns.map((c) => (c.name === o.by ? { ...c, type: "VARCHAR", description: `the group of ${o.by} (${o.groups})` } : c)),
      });
    }
    return out;
  },
  async check(ctx, o) {
    if (!ctx.tables.has(o.groups)) return;
    raise(o.id, `groups table ${o.groups} has empty cells`, await rowsWhere(ctx, o.groups, `member IS NULL OR "group" IS NULL`, `'member and group must both be given'`));
    raise(o.id, `groups table ${o.groups} lists a membership twice`, await duplicateKeys(ctx, o.groups, ["member", "group"]));
  },
  async run(ctx, o) {
    const s = ctx.session;
    const info = ctx.requireTable(o.input, "input");
    const input: TableSchema = { keys: info.keys, columns: (await s.columns(o.input)).map((c) => ({ name: c.name, type: c.type, description: "" })) };
    const { values, rest, sel, keys: orderKeys } = layout(input, o);
    const selNames = sel.map((c) => c.name);
    await s.run(`CREATE OR REPLACE TABLE ${ident(o.id)} AS
      SELECT ${selNames.map((c) => (c === o.by ? `CAST(g."group" AS VARCHAR) AS ${ident(o.by)}` : values.includes(c) ? `${ctx.exact.sum(`i.${ident(c)}`)} AS ${ident(c)}` : `i.${ident(c)}`)).join(", ")}
      FROM ${ident(o.input)} i JOIN ${ident(o.groups)} g ON CAST(g.member AS VARCHAR) = CAST(i.${ident(o.by)} AS VARCHAR)
      GROUP BY ALL
      ${o.keep_members ? `UNION ALL SELECT ${selNames.map((c) => (c === o.by ? `CAST(${ident(c)} AS VARCHAR)` : values.includes(c) ? `CAST(${ident(c)} AS DOUBLE)` : ident(c))).join(", ")} FROM ${ident(o.input)}` : ""}
      ORDER BY ${idents(orderKeys)}`);
    // Conservation: each group's total = the sum of its members' rows, per other key.
    const restKeys = rest.filter((c) => c !== "unit");
    for (const v of values) {
      await ctx.audits.check({
        step: o.id, check: `aggregate-conservation:${v}`, severity: "error",
        items: `WITH m AS (SELECT CAST(g."group" AS VARCHAR) AS grp, ${restKeys.map((k) => `i.${ident(k)}`).join(", ")}${restKeys.length ? "," : ""} ${ctx.exact.sum(`i.${ident(v)}`)} AS x
            FROM ${ident(o.input)} i JOIN ${ident(o.groups)} g ON CAST(g.member AS VARCHAR) = CAST(i.${ident(o.by)} AS VARCHAR) GROUP BY ALL),
          o AS (SELECT CAST(${ident(o.by)} AS VARCHAR) AS grp, ${restKeys.map(ident).join(", ")}${restKeys.length ? "," : ""} ${ctx.exact.sum(ident(v))} AS x
            FROM ${ident(o.id)} WHERE CAST(${ident(o.by)} AS VARCHAR) IN (SELECT CAST("group" AS VARCHAR) FROM ${ident(o.groups)}) GROUP BY ALL)
          SELECT ${keyMap([...restKeys.filter((k) => k !== "year")])} AS keys, ${restKeys.includes("year") ? "year" : "NULL"} AS year, o.x AS observed, m.x AS expected,
            ${ctx.pipeline.audit.conservation_rtol} * abs(m.x) + ${ctx.pipeline.audit.balance_atol} AS tolerance, 'group ' || grp || ': total ' || printf('%.10g', o.x) || ' ≠ sum of members ' || printf('%.10g', m.x) AS message
          FROM m JOIN o USING (grp${restKeys.length ? ", " + idents(restKeys) : ""})`,
        failMessage: "group total differs from the sum of its members",
      });
    }
    const from = rangesOf(ctx.pipeline.steps, o);
    if (from) await groupRanges(ctx, o, from, values);
    await ctx.audits.check({
      step: o.id, check: "aggregate-ungrouped", severity: "warning", unit: "rows",
      items: `SELECT ${keyMap([o.by])} AS keys, NULL AS year, CASE WHEN bool_or(g.member IS NULL) THEN count(*) ELSE 0 END AS observed, 0 AS expected, 0 AS tolerance,
        ${lit(`${o.by} `)} || CAST(i.${ident(o.by)} AS VARCHAR) || ' belongs to no group in ' || ${lit(o.groups)} || ' (' || count(*) || ' rows not in any group total)' AS message
        FROM ${ident(o.input)} i LEFT JOIN (SELECT DISTINCT CAST(member AS VARCHAR) AS member FROM ${ident(o.groups)}) g ON g.member = CAST(i.${ident(o.by)} AS VARCHAR)
        GROUP BY i.${ident(o.by)}`,
      failWhen: "observed > 0",
      failMessage: "member in no group",
    });
  },
});

/**
 * `<id>_uncertainty`: the rows of the cohort model's ranges summed over this step's groups (the
 * model sums every draw over each group), and the check that their central values are this
 * step's own sums.
 */
async function groupRanges(ctx: Parameters<typeof aggregateStep.run>[0], o: O, from: string, values: string[]): Promise<void> {
  const s = ctx.session;
  const cols = (await s.columns(from)).map((c) => c.name);
  const keys = ctx.requireTable(from, "input").keys;
  const label = `${o.by}:${o.groups}`;
  await s.run(`CREATE OR REPLACE TABLE ${ident(`${o.id}_uncertainty`)} AS
    SELECT ${cols.map((c) => (c === o.by ? `CAST(${ident(c)} AS VARCHAR) AS ${ident(c)}` : ident(c))).join(", ")} FROM ${ident(from)}
    WHERE total_over = ${lit(label)} ORDER BY ${keys.map(ident).join(", ")}`);
  const vars = ["inflow", "outflow", "stock"].filter((v) => values.includes(v));
  if (!vars.length) return;
  const other = keys.filter((k) => !["total_over", "material", "variable", "year"].includes(k));
  await ctx.audits.check({
    step: o.id, check: "uncertainty-central", severity: "error",
    items: `SELECT ${keyMap(other, "u")} AS keys, CAST(u.year AS INTEGER) AS year, u.central AS observed,
        CASE u.variable ${vars.map((v) => `WHEN ${lit(v)} THEN a.${ident(v)}`).join(" ")} END AS expected,
        ${ctx.pipeline.audit.conservation_rtol} * abs(u.central) + ${ctx.pipeline.audit.balance_atol} AS tolerance,
        'range of ' || u.variable || ': central ' || printf('%.10g', u.central) || ' is not this step''s total' AS message
      FROM ${ident(`${o.id}_uncertainty`)} u JOIN ${ident(o.id)} a ON ${other.map((k) => `CAST(a.${ident(k)} AS VARCHAR) = CAST(u.${ident(k)} AS VARCHAR)`).join(" AND ")} AND a.year = u.year
      WHERE u.material IS NULL AND u.variable IN (${vars.map(lit).join(", ")})`,
    failMessage: "the ranges' central values differ from the group totals",
  });
}
