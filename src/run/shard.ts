/**
 * One shard of a sharded run (`cairn run FILE --shard K/N --shard-by COLUMN`): the steps the
 * shard plan (plan/shard.ts) places in the shards, on the shard's values of the key.
 *
 * Keys: every shard loads and checks the sources its steps read, whole (so rejects and row
 * counts are a single run's, and every shard sees the same values), then lists the distinct
 * values of the key in the sources cut by it (for trade, reporters and partners), sorted
 * (byte order), and takes the K-th of N contiguous blocks: values i with
 * floor(K·V/N) ≤ i < floor((K+1)·V/N) of V values. Rows with an empty key go to shard 0. The
 * cut sources become views over the shard's rows (`trade`: reporter or partner among them).
 *
 * After each step: a `both` step's tables are cut to the shard's keys and its audits dropped
 * (the merge makes them on everything); every other shard step's cut tables are checked to
 * hold only the shard's keys (else the step was not per key: an internal error). Audits are
 * recorded with how they were made (ShardAuditLog), so the merge can add them up exactly.
 */
import { PipelineError } from "../errors.js";
import type { Session } from "../engine/session.js";
import { ident, lit } from "../engine/sql.js";
import { AuditLog, AUDIT_TABLE, type CheckResult, type CheckSpec } from "../audit/log.js";
import type { ShardPlan, StepShard } from "../plan/shard.js";
import type { StepNode } from "../plan/build.js";
import type { Run } from "./runner.js";

export interface ShardSpec {
  /** 0-based. */
  index: number;
  count: number;
  by: string;
}

/** `K/N` (0 ≤ K < N ≤ 10000). */
export function parseShard(v: string): { index: number; count: number } {
  const m = /^(\d{1,5})\/(\d{1,5})$/.exec(v.trim());
  const index = m ? Number(m[1]) : NaN;
  const count = m ? Number(m[2]) : NaN;
  if (!m || !(count >= 1 && count <= 10000) || !(index < count)) {
    throw new PipelineError(`--shard ${JSON.stringify(v)}: expected K/N with 0 ≤ K < N ≤ 10000 (K counts from 0), e.g. 0/4 … 3/4`);
  }
  return { index, count };
}

export const OWN_TABLE = "__cairn_shard_own";
export const ITEMS_TABLE = "__cairn_shard_items";
/** The shard's captured audit items (checks whose items are not per key), beside audit.parquet. */
export const ITEMS_FILE = "shard_audit_items";

/** SQL condition: the value is one of the shard's keys (an empty key belongs to shard 0). */
export function owned(expr: string, index: number): string {
  return `(CAST(${expr} AS VARCHAR) IN (SELECT v FROM ${OWN_TABLE})${index === 0 ? ` OR ${expr} IS NULL` : ""})`;
}

/** The K-th of N contiguous blocks of the sorted values. */
export function blockOf<T>(values: readonly T[], index: number, count: number): T[] {
  return values.slice(Math.floor((index * values.length) / count), Math.floor(((index + 1) * values.length) / count));
}

/** Lists the key values, takes the shard's block, and cuts the sources (views over the shard's rows). */
export async function cutSources(run: Run, sp: ShardPlan, shard: ShardSpec): Promise<{ all: string[]; own: string[] }> {
  const s = run.ctx.session;
  const cut = sp.sources.filter((x) => x.mode && x.mode.kind !== "whole" && run.ctx.tables.has(x.name));
  const parts: string[] = [];
  for (const x of cut) {
    const cols = x.mode!.kind === "keyed" ? [x.mode!.column] : x.mode!.kind === "trade" ? [x.mode!.reporter, x.mode!.partner] : [];
    for (const c of cols) parts.push(`SELECT DISTINCT CAST(${ident(c)} AS VARCHAR) AS v FROM ${ident(x.name)} WHERE ${ident(c)} IS NOT NULL`);
  }
  const all = parts.length ? (await s.all(`SELECT DISTINCT v FROM (${parts.join(" UNION ALL ")}) ORDER BY v`)).map((r) => String(r.v)) : [];
  const own = blockOf(all, shard.index, shard.count);
  // A shard that holds every value (one shard) reads its sources as they are.
  if (own.length === all.length) {
    await s.run(`CREATE OR REPLACE TABLE ${OWN_TABLE} AS SELECT unnest([${own.map(lit).join(", ")}]::VARCHAR[]) AS v`);
    run.progress.info(`shard ${shard.index} of ${shard.count}: all ${all.length} ${sp.by} values; sources not cut`);
    return { all, own };
  }
  await s.run(`CREATE OR REPLACE TABLE ${OWN_TABLE} (v VARCHAR)`);
  for (let i = 0; i < own.length; i += 1000) await s.run(`INSERT INTO ${OWN_TABLE} VALUES ${own.slice(i, i + 1000).map((v) => `(${lit(v)})`).join(", ")}`);
  // The oldest age of a stock in place, over the whole table (before the cut): see alignHorizon.
  const oldest = new Map<string, unknown>();
  for (const name of horizonSources(run, sp)) oldest.set(name, await s.scalar(`SELECT max(age) FROM ${ident(name)}`));
  for (const x of cut) {
    const m = x.mode!;
    const cond = m.kind === "keyed" ? owned(ident(m.column), shard.index) : m.kind === "trade" ? `(${owned(ident(m.reporter), shard.index)} OR ${owned(ident(m.partner), shard.index)})` : "TRUE";
    // The checked source stays as it is, renamed; the source's name becomes a view of the shard's rows
    // (a table, where a row is added to it below).
    const full = `__cairn_whole_${x.name}`;
    await s.run(`ALTER VIEW ${ident(x.name)} RENAME TO ${ident(full)}`);
    const t = `__cairn_shard_${x.name}`;
    if (oldest.get(x.name) != null) {
      await s.run(`CREATE OR REPLACE TABLE ${ident(t)} AS SELECT * FROM ${ident(full)} WHERE ${cond}`);
      await alignHorizon(run, x.name, t, oldest.get(x.name));
      await s.run(`CREATE VIEW ${ident(x.name)} AS SELECT * FROM ${ident(t)}`);
    } else {
      await s.run(`CREATE VIEW ${ident(x.name)} AS SELECT * FROM ${ident(full)} WHERE ${cond}`);
    }
    const n = Number(await s.scalar(`SELECT count(*) FROM ${ident(x.name)}`));
    run.progress.info(`source ${x.name}: ${n} rows for this shard (${m.kind === "trade" ? `${m.reporter} or ${m.partner}` : m.kind === "keyed" ? m.column : "all"} among its ${own.length} of ${all.length} ${sp.by} values)`);
  }
  return { all, own };
}

/**
 * Sources that are a cohort model's stock in place by age, read by nothing else in the shards.
 * A cohort model tabulates its lifetimes (`<id>_lifetimes`) over the model's years plus the
 * oldest age in place: in a shard, the oldest age among the shard's series, which can be
 * younger than the whole table's.
 */
function horizonSources(run: Run, sp: ShardPlan): string[] {
  const out: string[] = [];
  for (const src of sp.sources) {
    if (src.mode?.kind !== "keyed" || !run.plan.schemas.get(src.name)?.columns.some((c) => c.name === "age")) continue;
    const readers = run.plan.steps.filter((n) => n.reads.some((r) => r.table === src.name) && sp.steps.find((x) => x.id === n.id)!.placement !== "merge");
    if (readers.length && readers.every((n) => n.kind.kind === "cohort-model" && n.reads.every((r) => r.table !== src.name || r.option === "initial_stock"))) out.push(src.name);
  }
  return out;
}

/**
 * Gives the shard's stock in place the whole table's oldest age: one row of zero stock at that
 * age for the shard's first series. It adds nothing to any stock or flow (the amounts by age are
 * summed), so the shard's series get the single run's results, and every shard tabulates the
 * lifetimes over the same ages as a single run.
 */
async function alignHorizon(run: Run, name: string, table: string, age: unknown): Promise<void> {
  const s = run.ctx.session;
  const r = await s.one(`SELECT count(*) AS n, max(age) AS a FROM ${ident(table)}`);
  if (Number(r.n) === 0 || Number(r.a) === Number(age)) return;
  const keys = run.plan.schemas.get(name)!.keys.filter((k) => k !== "age");
  await s.run(`INSERT INTO ${ident(table)} SELECT * REPLACE (${lit(Number(age))} AS age, 0.0 AS value) FROM ${ident(table)} ORDER BY ${keys.map(ident).join(", ") || "ALL"} LIMIT 1`);
  run.progress.info(`source ${name}: a zero stock at age ${age} (the whole table's oldest) added to this shard's first series, so the lifetimes are tabulated over the same ages as in a single run`);
}

/** After a step ran in a shard: `both` steps' tables cut to the shard's keys (their audits dropped); every cut table checked. */
export async function afterShardStep(run: Run, node: StepNode, st: StepShard, shard: ShardSpec): Promise<void> {
  const s = run.ctx.session;
  for (const t of st.trim) {
    await s.run(`DELETE FROM ${ident(t.table)} WHERE NOT ${owned(ident(t.column), shard.index)}`);
  }
  if (st.placement === "both") await (run.audits as ShardAuditLog).discard(node.id, node.index + 1);
  for (const t of st.partitioned) {
    const bad = await s.all(`SELECT CAST(${ident(run.sp!.by)} AS VARCHAR) AS v, count(*) AS n FROM ${ident(t)} WHERE NOT ${owned(ident(run.sp!.by), shard.index)} GROUP BY 1 ORDER BY 1 LIMIT 3`);
    if (bad.length) {
      throw new Error(`step ${node.id} made rows of ${t} for ${run.sp!.by} values of other shards (${bad.map((b) => `${b.v}: ${b.n} rows`).join(", ")}); it is not per ${run.sp!.by} as the shard plan assumed (report this; run without --shard meanwhile)`);
    }
  }
}

export interface CheckMeta {
  step: string;
  check: string;
  step_index: number;
  /** check: AuditLog.check (SQL items); items: fromItems; note: a summary decided outside SQL. */
  method: "check" | "items" | "note";
  /** Its items do not name the shard key: every item was captured (passing ones too), for the merge to take each once. */
  global: boolean;
  fail_message?: string;
  /**
   * The summary's numbers exactly (the audit log writes them as SQL literals, which DuckDB reads
   * back as decimals, a last bit off at times): the worst |residual| over all items and over the
   * failing ones, a note's observed and expected value. The merge writes the largest the same way.
   */
  worst?: number | null;
  worst_fail?: number | null;
  observed?: number | null;
  expected?: number | null;
}

/**
 * The audit log of a shard: the same rows as a single run's for the shard's keys, plus what the
 * merge needs to add the shards' checks up exactly: how each check was made, and every item of a
 * check whose items do not name the shard key (e.g. one per lifetimes row), which several shards
 * may share. Whether a check's items name the key is read from its first item (a check builds
 * every item's keys the same way).
 */
export class ShardAuditLog extends AuditLog {
  private idx = 0;
  readonly meta: CheckMeta[] = [];

  constructor(private readonly sess: Session, baseUnit: string, private readonly by: string) {
    super(sess, baseUnit);
  }

  override async init(): Promise<void> {
    await super.init();
    await this.sess.run(`CREATE OR REPLACE TABLE ${ITEMS_TABLE} (step_index INTEGER, step VARCHAR, "check" VARCHAR, severity VARCHAR, unit VARCHAR,
      keys MAP(VARCHAR, VARCHAR), year INTEGER, observed DOUBLE, expected DOUBLE, residual DOUBLE, tolerance DOUBLE, fail BOOLEAN, message VARCHAR)`);
  }

  override setStepIndex(i: number): void {
    this.idx = i;
    super.setStepIndex(i);
  }

  private record(m: Omit<CheckMeta, "step_index">): void {
    for (const k of ["worst", "worst_fail", "observed", "expected"] as const) if (m[k] !== undefined && m[k] !== null && !Number.isFinite(m[k])) m[k] = null;
    const at = this.meta.findIndex((x) => x.step === m.step && x.check === m.check);
    const row = { ...m, step_index: this.idx };
    if (at >= 0) this.meta[at] = { ...row, global: row.global || this.meta[at]!.global };
    else this.meta.push(row);
  }

  override async check(c: CheckSpec): Promise<CheckResult> {
    const noKey = `map_extract_value(keys, ${lit(this.by)}) IS NULL`;
    const first = await this.sess.all(`SELECT ${noKey} AS g FROM (${c.items}) LIMIT 1`);
    const global = first.length > 0 && Boolean(first[0]!.g);
    const fail = c.failWhen ?? "abs(observed - expected) > tolerance";
    if (global) {
      await this.sess.run(`INSERT INTO ${ITEMS_TABLE} SELECT ${this.idx}, ${lit(c.step)}, ${lit(c.check)}, ${lit(c.severity)}, ${lit(c.unit ?? null)}, keys,
          CAST(year AS INTEGER), CAST(observed AS DOUBLE), CAST(expected AS DOUBLE), CAST(observed AS DOUBLE) - CAST(expected AS DOUBLE), CAST(tolerance AS DOUBLE),
          coalesce((${fail}), TRUE), CAST(message AS VARCHAR) FROM (${c.items})`);
    }
    const w = await this.sess.one(`SELECT max(abs(r)) AS w, max(abs(r)) FILTER (WHERE f) AS wf
      FROM (SELECT CAST(observed AS DOUBLE) - CAST(expected AS DOUBLE) AS r, coalesce((${fail}), TRUE) AS f FROM (${c.items}))`);
    const num = (x: unknown) => (x === null || x === undefined ? null : Number(x));
    this.record({ step: c.step, check: c.check, method: "check", global, fail_message: c.failMessage, worst: num(w.w), worst_fail: num(w.wf) });
    return super.check(c);
  }

  override async fromItems(c: Parameters<AuditLog["fromItems"]>[0]): Promise<CheckResult> {
    // As AuditLog.fromItems makes them.
    const worstFail = c.failing.length ? Math.max(...c.failing.map((f) => Math.abs(f.observed - f.expected))) : null;
    const worst = c.worst === null ? worstFail : Math.max(c.worst, worstFail ?? 0);
    this.record({ step: c.step, check: c.check, method: "items", global: c.failing.some((f) => f.keys[this.by] === undefined), worst, worst_fail: worstFail });
    return super.fromItems(c);
  }

  override async note(...a: Parameters<AuditLog["note"]>): Promise<void> {
    this.record({ step: a[0], check: a[1], method: "note", global: false, observed: a[6]?.observed ?? null, expected: a[6]?.expected ?? null });
    return super.note(...a);
  }

  /** A `both` step's audits in a shard: dropped (made at the merge on everything, where they sum over every key). */
  async discard(step: string, stepIndex: number): Promise<void> {
    await this.sess.run(`DELETE FROM ${AUDIT_TABLE} WHERE step_index = ${stepIndex} AND step = ${lit(step)}`);
    await this.sess.run(`DELETE FROM ${ITEMS_TABLE} WHERE step_index = ${stepIndex} AND step = ${lit(step)}`);
    for (let i = this.failedErrors.length - 1; i >= 0; i--) if (this.failedErrors[i]!.step === step) this.failedErrors.splice(i, 1);
    for (let i = this.meta.length - 1; i >= 0; i--) if (this.meta[i]!.step === step) this.meta.splice(i, 1);
  }

  /** The captured items, ordered, for the shard's file. */
  itemsSql(): string {
    return `SELECT * FROM ${ITEMS_TABLE} ORDER BY step_index, step, "check", CAST(keys AS VARCHAR), year, message, observed`;
  }
}

