/**
 * The shard plan: which steps of a pipeline run in the shards of a sharded run (each on the
 * rows of its own values of the shard key, e.g. its regions), which run at the merge, and how
 * each source is cut for the shards. Decided from the plan alone (no data is read).
 *
 * Placement of a step:
 * - `shards`: per key by its kind's contract; each shard publishes its keys' rows, and the merge
 *   takes the tables over (concatenated) with their audits. Its inputs are cut exactly to the
 *   shard's keys (a source filtered by the key, or an earlier shard step's table).
 * - `both`: per key, but some of its audits sum over every key (apparent consumption's unmapped
 *   mass and shares, mirror fill, concordance totals): it runs in the shards, on inputs that may
 *   hold more than the shard's rows (trade where the shard's regions are reporter or partner),
 *   its tables cut to the shard's keys, for the shard steps after it; and again at the merge on
 *   everything, where its tables and audits are made, and checked equal to the shards' rows.
 * - `merge`: everything else (aggregates and group totals, SQL not per key by its form, steps
 *   after a merge step, unknown kinds); always correct, never faster.
 *
 * Modes of a source in the shards: `keyed` (rows whose key column is one of the shard's values),
 * `trade` (rows where the shard's regions are reporter or partner), `whole`, or not read at all
 * (only merge steps read it). Sources are always loaded and checked whole (rejects and counts
 * are those of a single run); the cut is a view over the checked rows.
 */
import { PipelineError } from "../errors.js";
import type { Plan, StepNode } from "./build.js";
import { KeyAnalysis, NotPerKey, type Rel } from "./sql-keys.js";
import { SqlSandbox } from "./sandbox.js";

export type Placement = "shards" | "both" | "merge";

export type SourceMode = { kind: "keyed"; column: string } | { kind: "trade"; reporter: string; partner: string } | { kind: "whole" };

export interface StepShard {
  id: string;
  kind: string;
  placement: Placement;
  reason: string;
  /** Outputs whose rows are cut by the key (each shard has its own keys' rows). */
  partitioned: string[];
  /** Outputs that are not cut by the key (e.g. the lifetimes used): the union of the shards' rows, each row the same in every shard that has it. */
  shared: string[];
  /** Tables cut to the shard's keys after the step runs in a shard (`both` steps), by column. */
  trim: { table: string; column: string }[];
  /** Its years are those of its whole input (a cohort model): every shard's main table must span the same years. */
  span?: boolean;
}

export interface SourceShard {
  name: string;
  /** How the shards read it; null: only steps at the merge read it. */
  mode: SourceMode | null;
}

export interface ShardPlan {
  by: string;
  steps: StepShard[];
  sources: SourceShard[];
}

export const inShards = (p: ShardPlan, id: string) => p.steps.find((s) => s.id === id)!.placement !== "merge";
export const atMerge = (p: ShardPlan, id: string) => p.steps.find((s) => s.id === id)!.placement !== "shards";

const same = (a: SourceMode, b: SourceMode) => JSON.stringify(a) === JSON.stringify(b);
export const describeMode = (m: SourceMode | null, by: string): string =>
  !m ? "not read in the shards (only steps at the merge read it)"
    : m.kind === "whole" ? "read whole in every shard"
      : m.kind === "keyed" ? `rows of the shard's values of ${m.column}${m.column === by ? "" : ` (its ${by})`}`
        : `rows where the shard's ${by} values are ${m.reporter} or ${m.partner}`;

interface Verdict {
  placement: Placement;
  reason: string;
  demands: [string, SourceMode[]][];
  partitioned?: string[];
  shared?: string[];
  trim?: { table: string; column: string }[];
  span?: boolean;
}

interface RuleCtx {
  by: string;
  plan: Plan;
  /** Each source's mode: a first guess (for the SQL analysis), then settled by the steps' demands. */
  modes: Map<string, SourceMode>;
  settled: Set<string>;
  placed: Map<string, StepShard>;
  sql: Map<string, Record<string, unknown>>;
  analysis: KeyAnalysis;
  forced: Map<string, string>;
}

class Refuse extends Error {}
const refuse = (why: string): never => {
  throw new Refuse(why);
};

const isSource = (c: RuleCtx, t: string) => c.plan.sources.some((s) => s.name === t);
const hasColumn = (c: RuleCtx, t: string, col: string) => Boolean(c.plan.schemas.get(t)?.columns.some((x) => x.name === col));

/** The step that produces a table and whether its rows are cut by the key in the shards. */
function stepTable(c: RuleCtx, t: string): { step: StepShard; partitioned: boolean } {
  const id = c.plan.producer.get(t)!;
  const step = c.placed.get(id);
  if (!step || step.placement === "merge") return refuse(`it reads ${t}, which step ${id} makes at the merge`);
  return { step, partitioned: step.partitioned.includes(t) };
}

/** A table read as the shard's own rows of its series: a source cut by the key, or a shard step's cut table. */
function keyedInput(c: RuleCtx, t: string, d: [string, SourceMode[]][], accept: SourceMode[] = []): void {
  if (isSource(c, t)) {
    if (!hasColumn(c, t, c.by)) refuse(`source ${t} has no column ${c.by}`);
    const want: SourceMode = { kind: "keyed", column: c.by };
    const m = c.settled.has(t) ? c.modes.get(t) : undefined;
    if (m && !same(m, want) && !accept.some((a) => same(a, m))) refuse(`source ${t} must be ${describeMode(m, c.by)} for another step`);
    d.push([t, [want, ...accept]]);
    return;
  }
  const { partitioned } = stepTable(c, t);
  if (!partitioned) refuse(`${t} is not cut by ${c.by}`);
}

/** A small table read whole: a source. */
function wholeInput(c: RuleCtx, t: string, d: [string, SourceMode[]][]): void {
  if (!isSource(c, t)) refuse(`it reads ${t}, a table made by a step, as a small table read whole`);
  const m = c.settled.has(t) ? c.modes.get(t) : undefined;
  if (m && m.kind !== "whole") refuse(`source ${t} is cut by ${c.by} for another step, but this step reads it whole`);
  d.push([t, [{ kind: "whole" }]]);
}

const RULES: Record<string, (n: StepNode, c: RuleCtx) => Verdict> = {
  "apparent-consumption"(n, c) {
    const o = n.step as unknown as { id: string; production: string; trade: string; concordance?: string; keys?: string[];
      production_columns?: Record<string, string>; trade_columns?: Record<string, string> };
    const keys = o.keys ?? (o.concordance ? ["region", "product", "material"] : ["region", "commodity"]);
    if (c.by !== "region" || !keys.includes("region")) refuse(`its rows are per region (the production's region, the trade's reporter), and ${c.by === "region" ? "region is not among its keys" : `the shard key is ${c.by}`}`);
    const pc = { region: "region", ...o.production_columns };
    const tc = { reporter: "reporter", partner: "partner", ...o.trade_columns };
    const d: [string, SourceMode[]][] = [];
    if (isSource(c, o.production)) d.push([o.production, [{ kind: "keyed", column: pc.region }, { kind: "whole" }]]);
    else if (!stepTable(c, o.production).partitioned || pc.region !== c.by) refuse(`its production table ${o.production} is not cut by ${c.by}`);
    if (!isSource(c, o.trade)) refuse(`its trade table ${o.trade} is made by a step (a shard needs the partners' rows too: read trade from a source)`);
    d.push([o.trade, [{ kind: "trade", reporter: tc.reporter, partner: tc.partner }, { kind: "whole" }]]);
    if (o.concordance) wholeInput(c, o.concordance, d);
    const outs = n.outputs.map((x) => x.name);
    return {
      placement: "both", demands: d, partitioned: outs, trim: outs.map((t) => ({ table: t, column: "region" })),
      reason: "per region, in the shards on trade where their regions are reporter or partner (mirror statistics need the partners' reports); again at the merge, where its audits that sum over every region (unmapped mass, mirror fill, concordance) are made",
    };
  },

  concordance(n, c) {
    const o = n.step as unknown as { input: string; concordance: string; keys?: string[] };
    const keys = o.keys ?? (c.plan.schemas.get(o.input)?.keys ?? []).filter((k) => k !== "commodity" && k !== "year");
    if (!keys.includes(c.by)) refuse(`${c.by} is not among its group keys (${keys.join(", ") || "none"})`);
    const d: [string, SourceMode[]][] = [];
    keyedInput(c, o.input, d);
    wholeInput(c, o.concordance, d);
    const outs = n.outputs.map((x) => x.name);
    return {
      placement: "both", demands: d, partitioned: outs, trim: outs.map((t) => ({ table: t, column: c.by })),
      reason: `per ${c.by} in the shards; again at the merge, where its audits that sum over every ${c.by} (unmapped mass and shares) are made`,
    };
  },

  sql(n, c) {
    const o = n.step as unknown as { inputs: string[] };
    const env = new Map<string, Rel>();
    const d: [string, SourceMode[]][] = [];
    for (const t of o.inputs) {
      const cols = (c.plan.schemas.get(t)?.columns ?? []).map((x) => x.name.toLowerCase());
      if (isSource(c, t)) {
        const m = c.modes.get(t) ?? { kind: "whole" };
        if (m.kind === "trade") refuse(`source ${t} holds other shards' rows too in the shards (partners' trade)`);
        env.set(t.toLowerCase(), { columns: cols, key: cols.map((x) => m.kind === "keyed" && x === m.column.toLowerCase()), partitioned: m.kind === "keyed" });
        d.push([t, [m]]);
      } else {
        const { partitioned } = stepTable(c, t);
        if (!partitioned) refuse(`it reads ${t}, whose rows in a shard depend on the shard's series`);
        env.set(t.toLowerCase(), { columns: cols, key: cols.map((x) => x === c.by.toLowerCase()), partitioned: true });
      }
    }
    let rel: Rel;
    try {
      rel = c.analysis.query(c.sql.get(n.id)!.node as Record<string, unknown>, env);
    } catch (e) {
      if (e instanceof NotPerKey) return refuse(`its query is not per ${c.by} by its form: ${e.message}`);
      throw e;
    }
    const i = rel.columns.indexOf(c.by.toLowerCase());
    if (!rel.partitioned) refuse("its query reads no table cut by the key");
    if (i < 0 || !rel.key[i]) refuse(`its result's column ${c.by} is not the ${c.by} of the rows it comes from`);
    return { placement: "shards", demands: d, partitioned: [n.id], reason: `its query is per ${c.by} by its form` };
  },

  "cohort-model"(n, c) {
    const o = n.step as unknown as { input: string; keys: string[]; lifetimes: string; curves?: string; content?: string; initial_stock?: string; continues?: { step: string }; uncertainty?: unknown };
    if (!o.keys.includes(c.by)) refuse(`${c.by} is not among its series keys (${o.keys.join(", ")})`);
    // Monte Carlo: draws are made per lifetimes row used and per material for the step's whole set of series, and totals sum over series.
    if (o.uncertainty) refuse("its Monte Carlo draws are made for the whole set of series it runs (lifetimes rows used, materials) and its totals and sensitivity indices combine series of every shard; splitting draws is not supported yet");
    const d: [string, SourceMode[]][] = [];
    keyedInput(c, o.input, d);
    if (o.initial_stock) keyedInput(c, o.initial_stock, d);
    for (const t of [o.lifetimes, o.curves, o.content]) if (t) wholeInput(c, t, d);
    if (o.continues) {
      const from = c.placed.get(o.continues.step);
      if (!from || from.placement !== "shards") refuse(`it continues step ${o.continues.step}, which runs at the merge`);
    }
    const main = n.outputs.filter((x) => x.keys.includes(c.by)).map((x) => x.name);
    return {
      placement: "shards", demands: d, partitioned: main, shared: n.outputs.filter((x) => !main.includes(x.name)).map((x) => x.name), span: true,
      reason: `each series (${o.keys.join(" × ")}) is computed on its own`,
    };
  },

  "yearly-path"(n, c) {
    const o = n.step as unknown as { input: string; keys?: string[]; multiply?: { table: string; keys: string[] } };
    const keys = o.keys ?? (c.plan.schemas.get(o.input)?.keys ?? []).filter((k) => k !== "year");
    if (!keys.includes(c.by)) refuse(`${c.by} is not among its series keys (${keys.join(", ") || "none"})`);
    const d: [string, SourceMode[]][] = [];
    keyedInput(c, o.input, d);
    if (o.multiply) {
      if (o.multiply.keys.includes(c.by)) keyedInput(c, o.multiply.table, d, [{ kind: "whole" }]);
      else wholeInput(c, o.multiply.table, d);
    }
    return { placement: "shards", demands: d, partitioned: [n.id], reason: "each series' path is made from its own anchors" };
  },
};

function verdict(n: StepNode, c: RuleCtx): Verdict {
  const forced = c.forced.get(n.id);
  if (forced) return { placement: "merge", reason: forced, demands: [] };
  const rule = RULES[n.kind.kind];
  if (!rule) {
    return { placement: "merge", reason: n.kind.kind === "aggregate" ? "its group totals add up the rows of several keys" : `steps of kind ${n.kind.kind} are not known to be per key`, demands: [] };
  }
  try {
    return rule(n, c);
  } catch (e) {
    if (e instanceof Refuse) return { placement: "merge", reason: e.message, demands: [] };
    throw e;
  }
}

/** The initial mode of each source, before the steps' demands settle it. */
function initialModes(plan: Plan, by: string): Map<string, SourceMode> {
  const m = new Map<string, SourceMode>();
  for (const s of plan.sources) if (s.schema.columns.some((x) => x.name === by)) m.set(s.name, { kind: "keyed", column: by });
  for (const n of plan.steps) {
    if (n.kind.kind !== "apparent-consumption") continue;
    const o = n.step as unknown as { production: string; trade: string; production_columns?: Record<string, string>; trade_columns?: Record<string, string> };
    if (plan.sources.some((s) => s.name === o.trade)) m.set(o.trade, { kind: "trade", reporter: o.trade_columns?.reporter ?? "reporter", partner: o.trade_columns?.partner ?? "partner" });
    if (plan.sources.some((s) => s.name === o.production)) m.set(o.production, { kind: "keyed", column: o.production_columns?.region ?? "region" });
  }
  return m;
}

export async function planShards(plan: Plan, by: string): Promise<ShardPlan> {
  if (!/^[A-Za-z_][A-Za-z0-9_]*$/.test(by)) throw new PipelineError(`--shard-by ${JSON.stringify(by)}: expected a column name (letters, digits, _)`);
  const sandbox = await SqlSandbox.open();
  const sql = new Map<string, Record<string, unknown>>();
  let aggregates: Set<string>;
  try {
    for (const n of plan.steps) if (n.kind.kind === "sql") sql.set(n.id, await sandbox.parseTree((n.step as unknown as { query: string }).query));
    aggregates = await sandbox.aggregateNames();
  } finally {
    sandbox.close();
  }
  const c: RuleCtx = { by, plan, modes: initialModes(plan, by), settled: new Set(), placed: new Map(), sql, analysis: new KeyAnalysis(aggregates), forced: new Map() };
  let demanded = new Map<string, SourceMode[][]>();
  for (let round = 0; round < 4 * (plan.steps.length + plan.sources.length) + 4; round++) {
    c.placed = new Map();
    demanded = new Map();
    for (const n of plan.steps) {
      const v = verdict(n, c);
      c.placed.set(n.id, {
        id: n.id, kind: n.kind.kind, placement: v.placement, reason: v.reason,
        partitioned: v.placement === "merge" ? [] : v.partitioned ?? [], shared: v.placement === "merge" ? [] : v.shared ?? [], trim: v.trim ?? [],
        ...(v.span && v.placement !== "merge" ? { span: true } : {}),
      });
      if (v.placement !== "merge") for (const [t, modes] of v.demands) demanded.set(t, [...(demanded.get(t) ?? []), modes]);
    }
    // Settle each demanded source on a mode every reader accepts; with none, read it whole (the readers that need it cut then run at the merge).
    let changed = false;
    for (const [t, lists] of demanded) {
      const common = lists[0]!.filter((m) => lists.every((l) => l.some((x) => same(x, m))));
      const mode = common[0] ?? { kind: "whole" as const };
      const was = c.modes.get(t);
      if (!was || !same(was, mode) || !c.settled.has(t)) {
        c.modes.set(t, mode);
        c.settled.add(t);
        changed = true;
      }
    }
    // A merge step that continues a model needs that model's end state (kept in memory): the model runs at the merge too.
    for (const n of plan.steps) {
      const cont = (n.step as { continues?: { step: string } }).continues?.step;
      if (cont && c.placed.get(n.id)!.placement === "merge" && c.placed.get(cont)?.placement !== "merge" && !c.forced.has(cont)) {
        c.forced.set(cont, `step ${n.id}, which runs at the merge, continues it (it needs its end state, kept in memory)`);
        changed = true;
      }
    }
    if (!changed) break;
  }
  const steps = plan.steps.map((n) => c.placed.get(n.id)!);
  if (!steps.some((s) => s.placement !== "merge")) {
    throw new PipelineError(`--shard-by ${by}: no step of this pipeline can run in shards by ${by}:\n` + steps.map((s) => `  ${s.id} (${s.kind}): ${s.reason}`).join("\n"));
  }
  return { by, steps, sources: plan.sources.map((s) => ({ name: s.name, mode: demanded.has(s.name) ? c.modes.get(s.name) ?? { kind: "whole" } : null })) };
}
