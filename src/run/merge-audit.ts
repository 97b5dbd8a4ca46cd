/**
 * The audits of a step taken over from the shards, merged into the rows a single run writes.
 * Each shard recorded how each check was made (ShardAuditLog, run/shard.ts):
 * - a check whose items name the shard key: the shards' item rows are concatenated; the summary
 *   adds up the items checked and failed and takes the largest of the shards' exact worst
 *   residuals, written (and its message) as the audit log writes them;
 * - a check whose items do not name the key (one per lifetimes row, say): every item was kept
 *   in the shard (passing ones too); each is taken once (shards that share it must agree on it
 *   exactly), and the summary is made from them;
 * - a note (a count decided outside SQL, of what the shard holds): the counts are added, and the
 *   message is written again from NOTE_MESSAGES; a note not listed there keeps its message when
 *   every shard wrote the same text without numbers, else the shards' messages are listed.
 */
import { lit } from "../engine/sql.js";
import { AUDIT_TABLE } from "../audit/log.js";
import type { StepNode } from "../plan/build.js";
import { ClusterError } from "../cluster/errors.js";
import { ITEMS_FILE, type CheckMeta } from "./shard.js";
import type { Run } from "./runner.js";
import { withKeys } from "./merge.js";
import path from "node:path";

/** Messages of notes whose text carries counts, as the steps write them (src/steps/cohort-model/audits.ts). */
export const NOTE_MESSAGES: Record<string, (a: { step: string; items: number; failed: number; messages: string[] }) => string | null> = {
  "materials-coverage": ({ step, items, failed, messages }) =>
    messages.every((m) => m.startsWith("the content table")) ? messages[0]!
      : failed > 0 ? `${failed} series have no row in the content table and are not in ${step}_materials` : `${items} series have content`,
};

const p3 = (x: unknown) => Number(x).toPrecision(3);
/** A number as the audit log writes it into SQL (a literal), so the stored value is the same. */
const num = (x: unknown) => (x === null || x === undefined ? "NULL" : lit(Number(x)));

/** The summary message of AuditLog.check (a check over SQL items). */
function checkMessage(n: number, failed: number, worst: unknown, worstFail: unknown, unit: string | null): string {
  return `${n} items checked, ${n - failed} passed, ${failed} failed${worst == null ? "" : `; worst |residual| ${p3(worst)} ${unit}`}${failed ? ` (worst failing ${p3(worstFail)} ${unit})` : ""}`;
}

/** The summary message of AuditLog.fromItems. */
const itemsMessage = (n: number, failed: number) => `${n} items checked, ${n - failed} passed, ${failed} failed`;

export async function mergeStepAudits(run: Run, node: StepNode): Promise<void> {
  const s = run.ctx.session;
  const shards = withKeys(run);
  const idx = node.index + 1;
  const M = "__cairn_merge_audit";
  const I = "__cairn_merge_items";
  await s.run(`CREATE OR REPLACE TEMP TABLE ${M} AS ${shards.map((sh) => `SELECT ${sh.index} AS shard, * FROM read_parquet(${lit(path.join(sh.dir, "audit.parquet"))}) WHERE step = ${lit(node.id)}`).join(" UNION ALL ")}`);
  await s.run(`CREATE OR REPLACE TEMP TABLE ${I} AS ${shards.map((sh) => `SELECT ${sh.index} AS shard, * FROM read_parquet(${lit(path.join(sh.dir, `${ITEMS_FILE}.parquet`))}) WHERE step = ${lit(node.id)}`).join(" UNION ALL ")}`);
  const checks = new Map<string, CheckMeta>();
  const notes = new Map<string, CheckMeta[]>();
  // The largest exact worst residual over the shards (null when none has one).
  const most = (a: number | null | undefined, b: number | null | undefined) => (a == null ? b ?? null : b == null ? a : Math.max(a, b));
  for (const sh of shards) {
    for (const m of sh.manifest.shard.audit_checks.filter((x) => x.step === node.id)) {
      const was = checks.get(m.check);
      if (was && was.method !== m.method) throw new ClusterError(`audit ${node.id} ${m.check}: made differently in the shards (${was.method}, ${m.method}); the shards do not come from one plan`);
      checks.set(m.check, was ? { ...was, global: was.global || m.global, worst: most(was.worst, m.worst), worst_fail: most(was.worst_fail, m.worst_fail) } : { ...m });
      if (m.method === "note") notes.set(m.check, [...(notes.get(m.check) ?? []), m]);
    }
  }
  const where = (c: string) => `"check" = ${lit(c)}`;
  for (const c of checks.values()) {
    if (c.method === "note") {
      // A note counts what its shard holds (series, say): the counts are added, and the message is written again.
      const rows = await s.all(`SELECT shard, message FROM ${M} WHERE ${where(c.check)} AND row_kind = 'summary' ORDER BY shard`);
      const r = await s.one(`SELECT CAST(sum(items) AS BIGINT) AS n, CAST(sum(failed) AS BIGINT) AS f FROM ${M} WHERE ${where(c.check)} AND row_kind = 'summary'`);
      const items = Number(r.n);
      const failed = Number(r.f);
      const messages = rows.map((x) => String(x.message));
      const message = NOTE_MESSAGES[c.check]?.({ step: node.id, items, failed, messages })
        ?? (messages.every((m) => m === messages[0]) && !/\d/.test(messages[0]!) ? messages[0]!
          : `${items} items over ${rows.length} shards, ${failed} failed: ${rows.map((x) => `shard ${x.shard}: ${x.message}`).join("; ")}`);
      // Observed and expected added up from the shards' exact values, written as the audit log writes them.
      const metas = notes.get(c.check) ?? [];
      const sum = (k: "observed" | "expected") => (metas.length && metas.every((m) => typeof m[k] === "number") ? metas.reduce((a, m) => a + (m[k] as number), 0) : null);
      const o = sum("observed");
      const e = sum("expected");
      await s.run(`INSERT INTO ${AUDIT_TABLE} SELECT ${idx}, ${lit(node.id)}, ${lit(c.check)}, any_value(severity),
          CASE WHEN sum(failed) > 0 OR bool_or(status = 'fail') THEN 'fail' ELSE 'pass' END, 'summary', MAP {}::MAP(VARCHAR, VARCHAR), NULL,
          ${lit(o)}, ${lit(e)}, ${o !== null && e !== null ? lit(o - e) : "NULL"}, NULL, any_value(unit),
          ${items}, ${failed}, NULL, NULL, ${lit(message)}
        FROM ${M} WHERE ${where(c.check)} AND row_kind = 'summary'`);
    } else if (c.global) {
      if (c.method !== "check") throw new ClusterError(`audit ${node.id} ${c.check}: its items do not name ${run.sp!.by}, so they cannot be added up across shards; run this pipeline without shards`);
      const clash = await s.all(`SELECT CAST(keys AS VARCHAR) AS k, year FROM ${I} WHERE ${where(c.check)} GROUP BY CAST(keys AS VARCHAR), year
        HAVING count(DISTINCT (observed, expected, tolerance, fail, message)) > 1 LIMIT 1`);
      if (clash.length) {
        throw new ClusterError(`audit ${node.id} ${c.check}: the shards disagree on the item ${clash[0]!.k}${clash[0]!.year == null ? "" : ` ${clash[0]!.year}`}; this step's result depends on the series of other shards (e.g. the years or ages of the whole input), so it cannot be split by ${run.sp!.by}: run without shards`);
      }
      const D = "__cairn_merge_distinct";
      await s.run(`CREATE OR REPLACE TEMP TABLE ${D} AS SELECT DISTINCT ON (CAST(keys AS VARCHAR), year) * EXCLUDE (shard) FROM ${I} WHERE ${where(c.check)} ORDER BY CAST(keys AS VARCHAR), year`);
      const unit = await s.scalar(`SELECT any_value(unit) FROM ${M} WHERE ${where(c.check)} AND row_kind = 'summary'`);
      const r = await s.one(`SELECT count(*) AS n, count(*) FILTER (WHERE fail) AS f, max(abs(residual)) AS w, max(abs(residual)) FILTER (WHERE fail) AS wf, any_value(severity) AS sev FROM ${D}`);
      await s.run(`INSERT INTO ${AUDIT_TABLE} SELECT ${idx}, step, "check", severity, 'fail', 'item', keys, year, observed, expected, residual, tolerance, ${lit(unit as string | null)},
          NULL, NULL, NULL, NULL, coalesce(message, ${lit(c.fail_message ?? null)}) FROM ${D} WHERE fail`);
      const n = Number(r.n);
      const f = Number(r.f);
      await s.run(`INSERT INTO ${AUDIT_TABLE} SELECT ${idx}, ${lit(node.id)}, ${lit(c.check)}, any_value(severity), ${lit(f > 0 ? "fail" : "pass")}, 'summary', MAP {}::MAP(VARCHAR, VARCHAR),
          NULL, NULL, NULL, NULL, NULL, ${lit(unit as string | null)}, ${n}, ${f}, ${num(r.w)}, ${num(r.wf)},
          ${lit(checkMessage(n, f, r.w, r.wf, unit as string | null))} FROM ${D}`);
      if (f > 0 && r.sev === "error") run.audits.failedErrors.push({ step: node.id, check: c.check, failed: f, example: "see audit.parquet" });
      await s.run(`DROP TABLE ${D}`);
    } else {
      await s.run(`INSERT INTO ${AUDIT_TABLE} SELECT ${idx}, step, "check", severity, status, row_kind, keys, year, observed, expected, residual, tolerance, unit, items, failed,
          worst_residual, worst_failing_residual, message FROM ${M} WHERE ${where(c.check)} AND row_kind = 'item'`);
      const r = await s.one(`SELECT CAST(sum(items) AS BIGINT) AS n, CAST(sum(failed) AS BIGINT) AS f,
          any_value(unit) AS unit, count(DISTINCT severity) AS sevs, any_value(severity) AS sev FROM ${M} WHERE ${where(c.check)} AND row_kind = 'summary'`);
      if (Number(r.sevs) > 1) throw new ClusterError(`audit ${node.id} ${c.check}: the shards give it different severities; they do not come from one plan`);
      const n = Number(r.n);
      const f = Number(r.f);
      const w = c.worst ?? null;
      const wf = c.worst_fail ?? null;
      const message = c.method === "check" ? checkMessage(n, f, w, wf, r.unit as string | null) : itemsMessage(n, f);
      await s.run(`INSERT INTO ${AUDIT_TABLE} SELECT ${idx}, ${lit(node.id)}, ${lit(c.check)}, any_value(severity), ${lit(f > 0 ? "fail" : "pass")}, 'summary', MAP {}::MAP(VARCHAR, VARCHAR),
          NULL, NULL, NULL, NULL, NULL, any_value(unit), ${n}, ${f}, ${num(w)}, ${num(wf)}, ${lit(message)}
        FROM ${M} WHERE ${where(c.check)} AND row_kind = 'summary'`);
      if (f > 0 && r.sev === "error") run.audits.failedErrors.push({ step: node.id, check: c.check, failed: f, example: "see audit.parquet" });
    }
  }
  await s.run(`DROP TABLE ${M}; DROP TABLE ${I}`);
}
