/**
 * Audit records (DESIGN.md, "Audits"): every failing item is its own row; every check that ran
 * adds one summary row with the items checked, how many failed, its status (`fail` as soon as
 * one item failed), the worst |residual| over all items and over the failing ones. The console
 * summary, audit.parquet and the manifest are all read from these rows, so they agree.
 */
import type { Session } from "../engine/session.js";
import { lit } from "../engine/sql.js";

export const AUDIT_TABLE = "__cairn_audit";

export interface CheckSpec {
  step: string;
  check: string;
  severity: "error" | "warning";
  /**
   * SQL yielding one row per item with columns: keys (MAP(VARCHAR, VARCHAR)),
   * year (INTEGER or NULL), observed, expected, tolerance (DOUBLE), message (VARCHAR or NULL).
   */
  items: string;
  /** SQL condition over those columns that marks a failing item (default |observed − expected| > tolerance). */
  failWhen?: string;
  /** Message for failing items whose `message` is NULL. */
  failMessage: string;
  /** Unit of observed, expected and residual (default: the pipeline's base unit); "1" for shares. */
  unit?: string;
}

export interface CheckResult {
  check: string;
  severity: "error" | "warning";
  items: number;
  failed: number;
}

export interface CheckSummary {
  step: string;
  check: string;
  severity: string;
  status: "pass" | "fail";
  items: number;
  failed: number;
  worst_residual: number | null;
  worst_failing_residual: number | null;
  unit: string | null;
}

export interface AuditSummary {
  rows: number;
  checks: CheckSummary[];
  /** Failed items of severity error and of severity warning. */
  errors: number;
  warnings: number;
  worst: { step: string; check: string; severity: string; keys: Record<string, string>; year: number | null; residual: number | null; message: string }[];
}

export class AuditLog {
  private stepIndex = 0;
  readonly failedErrors: { step: string; check: string; failed: number; example: string }[] = [];

  constructor(private readonly s: Session, private readonly baseUnit = "t") {}

  async init(): Promise<void> {
    await this.s.run(`CREATE OR REPLACE TABLE ${AUDIT_TABLE} (
      step_index INTEGER, step VARCHAR, "check" VARCHAR, severity VARCHAR, status VARCHAR, row_kind VARCHAR,
      keys MAP(VARCHAR, VARCHAR), year INTEGER, observed DOUBLE, expected DOUBLE, residual DOUBLE,
      tolerance DOUBLE, unit VARCHAR, items BIGINT, failed BIGINT, worst_residual DOUBLE, worst_failing_residual DOUBLE, message VARCHAR)`);
  }

  setStepIndex(i: number): void {
    this.stepIndex = i;
  }

  async check(c: CheckSpec): Promise<CheckResult> {
    const fail = c.failWhen ?? "abs(observed - expected) > tolerance";
    const unit = c.unit ?? this.baseUnit;
    const tmp = "__cairn_audit_items";
    // The numbers of every item first; keys and message (a map and a text per item, the
    // costly part) are not selected, so the engine does not compute them for passing items.
    const items = (cols: string) => `SELECT ${cols}, CAST(year AS INTEGER) AS year, CAST(observed AS DOUBLE) AS observed, CAST(expected AS DOUBLE) AS expected,
             CAST(observed AS DOUBLE) - CAST(expected AS DOUBLE) AS residual, CAST(tolerance AS DOUBLE) AS tolerance,
             coalesce((${fail}), TRUE) AS __fail
      FROM (${c.items})`;
    await this.s.run(`CREATE OR REPLACE TEMP TABLE ${tmp} AS ${items("NULL AS __none")}`);
    const head = `${this.stepIndex}, ${lit(c.step)}, ${lit(c.check)}, ${lit(c.severity)}`;
    const r = await this.s.one(`SELECT count(*) AS n, count(*) FILTER (WHERE __fail) AS f,
      max(abs(residual)) AS worst, max(abs(residual)) FILTER (WHERE __fail) AS worst_fail FROM ${tmp}`);
    const n = Number(r.n);
    const failed = Number(r.f);
    if (failed > 0) {
      // Failing items with their keys and message: the items query again, for them only.
      await this.s.run(`CREATE OR REPLACE TEMP TABLE ${tmp} AS SELECT * FROM (${items("keys, CAST(message AS VARCHAR) AS message")}) WHERE __fail`);
      await this.s.run(`INSERT INTO ${AUDIT_TABLE}
        SELECT ${head}, 'fail', 'item', keys, year, observed, expected, residual, tolerance, ${lit(unit)}, NULL, NULL, NULL, NULL, coalesce(message, ${lit(c.failMessage)})
        FROM ${tmp}`);
    }
    const num = (x: unknown) => (x === null || x === undefined ? "NULL" : lit(Number(x)));
    const fmt = (x: unknown) => (x === null || x === undefined ? "" : `; worst |residual| ${Number(x).toPrecision(3)} ${unit}`);
    await this.s.run(`INSERT INTO ${AUDIT_TABLE} VALUES (${head}, ${lit(failed > 0 ? "fail" : "pass")}, 'summary', MAP {}, NULL, NULL, NULL, NULL, NULL, ${lit(unit)},
      ${n}, ${failed}, ${num(r.worst)}, ${num(r.worst_fail)},
      ${lit(`${n} items checked, ${n - failed} passed, ${failed} failed${fmt(r.worst)}${failed ? ` (worst failing ${Number(r.worst_fail).toPrecision(3)} ${unit})` : ""}`)})`);
    if (failed > 0 && c.severity === "error") {
      const ex = await this.s.one(`SELECT CAST(keys AS VARCHAR) AS k, year, coalesce(message, ${lit(c.failMessage)}) AS m FROM ${tmp}
        ORDER BY CAST(keys AS VARCHAR), year LIMIT 1`);
      this.failedErrors.push({ step: c.step, check: c.check, failed, example: `${ex.k}${ex.year == null ? "" : ` year ${ex.year}`}: ${ex.m}` });
    }
    await this.s.run(`DROP TABLE ${tmp}`);
    return { check: c.check, severity: c.severity, items: n, failed };
  }

  /**
   * A check computed outside SQL over `items` items: its failing items given one by one (each
   * its own row), and one summary row, as for `check`.
   */
  async fromItems(c: { step: string; check: string; severity: "error" | "warning"; unit?: string; items: number; worst: number | null;
    failing: { keys: Record<string, string>; year: number | null; observed: number; expected: number; tolerance: number; message: string }[] }): Promise<CheckResult> {
    const unit = c.unit ?? this.baseUnit;
    const head = `${this.stepIndex}, ${lit(c.step)}, ${lit(c.check)}, ${lit(c.severity)}`;
    const mapOf = (k: Record<string, string>) => (Object.keys(k).length ? `MAP([${Object.keys(k).map((x) => lit(x)).join(", ")}], [${Object.values(k).map((x) => lit(x)).join(", ")}])` : "MAP {}::MAP(VARCHAR, VARCHAR)");
    for (let i = 0; i < c.failing.length; i += 500) {
      const rows = c.failing.slice(i, i + 500).map((f) => `(${head}, 'fail', 'item', ${mapOf(f.keys)}, ${f.year ?? "NULL"}, ${lit(f.observed)}, ${lit(f.expected)}, ${lit(f.observed - f.expected)}, ${lit(f.tolerance)}, ${lit(unit)}, NULL, NULL, NULL, NULL, ${lit(f.message)})`);
      await this.s.run(`INSERT INTO ${AUDIT_TABLE} VALUES ${rows.join(", ")}`);
    }
    const failed = c.failing.length;
    const worstFail = failed ? Math.max(...c.failing.map((f) => Math.abs(f.observed - f.expected))) : null;
    const worst = c.worst === null ? worstFail : Math.max(c.worst, worstFail ?? 0);
    await this.s.run(`INSERT INTO ${AUDIT_TABLE} VALUES (${head}, ${lit(failed > 0 ? "fail" : "pass")}, 'summary', MAP {}, NULL, NULL, NULL, NULL, NULL, ${lit(unit)},
      ${c.items}, ${failed}, ${lit(worst)}, ${lit(worstFail)}, ${lit(`${c.items} items checked, ${c.items - failed} passed, ${failed} failed`)})`);
    if (failed > 0 && c.severity === "error") {
      const f = c.failing[0]!;
      this.failedErrors.push({ step: c.step, check: c.check, failed, example: `${JSON.stringify(f.keys)}${f.year == null ? "" : ` year ${f.year}`}: ${f.message}` });
    }
    return { check: c.check, severity: c.severity, items: c.items, failed };
  }

  /**
   * A check decided outside SQL (e.g. rows rejected, series without content): one summary row
   * with its counts, and a message. `counts` defaults to one item, failed when status is fail.
   */
  async note(step: string, check: string, severity: "error" | "warning", status: "pass" | "fail", message: string,
    counts?: { items: number; failed: number }, values?: { observed?: number | null; expected?: number | null; unit?: string }): Promise<void> {
    const items = counts?.items ?? 1;
    const failed = counts?.failed ?? (status === "fail" ? 1 : 0);
    const st = failed > 0 || status === "fail" ? "fail" : "pass";
    const o = values?.observed ?? null;
    const e = values?.expected ?? null;
    await this.s.run(`INSERT INTO ${AUDIT_TABLE} VALUES (${this.stepIndex}, ${lit(step)}, ${lit(check)}, ${lit(severity)}, ${lit(st)}, 'summary',
      MAP {}, NULL, ${lit(o)}, ${lit(e)}, ${o !== null && e !== null ? lit(o - e) : "NULL"}, NULL, ${values?.unit ? lit(values.unit) : "NULL"},
      ${items}, ${failed}, NULL, NULL, ${lit(message)})`);
    if (st === "fail" && severity === "error") this.failedErrors.push({ step, check, failed: Math.max(failed, 1), example: message });
  }

  /** The ordered audit table, as SQL, for publishing. */
  orderedSql(): string {
    return `SELECT step, "check", severity, status, row_kind, keys, year, observed, expected, residual, tolerance, unit, items, failed, worst_residual, worst_failing_residual, message
      FROM ${AUDIT_TABLE} ORDER BY step_index, step, "check", row_kind, status DESC, CAST(keys AS VARCHAR), year, message, observed`;
  }

  async summary(worstN = 5): Promise<AuditSummary> {
    const checks = await this.s.all(`SELECT step, "check", severity, status, items, failed, worst_residual, worst_failing_residual, unit
      FROM ${AUDIT_TABLE} WHERE row_kind = 'summary' ORDER BY step_index, step, "check"`);
    const worst = await this.s.all(`SELECT step, "check", severity, CAST(keys AS JSON) AS keys, year, residual, message FROM ${AUDIT_TABLE}
      WHERE status = 'fail' AND (row_kind = 'item' OR items IS NOT NULL AND NOT EXISTS (SELECT 1 FROM ${AUDIT_TABLE} i WHERE i.row_kind = 'item' AND i.step = ${AUDIT_TABLE}.step AND i."check" = ${AUDIT_TABLE}."check"))
      ORDER BY severity = 'error' DESC, abs(coalesce(residual, 0)) DESC, step, "check", CAST(keys AS VARCHAR), year LIMIT ${worstN}`);
    const rows = Number(await this.s.scalar(`SELECT count(*) FROM ${AUDIT_TABLE}`));
    let errors = 0;
    let warnings = 0;
    const list: CheckSummary[] = checks.map((c) => ({
      step: String(c.step), check: String(c.check), severity: String(c.severity), status: c.status === "fail" ? "fail" : "pass",
      items: Number(c.items), failed: Number(c.failed),
      worst_residual: c.worst_residual == null ? null : Number(c.worst_residual),
      worst_failing_residual: c.worst_failing_residual == null ? null : Number(c.worst_failing_residual),
      unit: c.unit == null ? null : String(c.unit),
    }));
    for (const c of list) c.severity === "error" ? (errors += c.failed) : (warnings += c.failed);
    return {
      rows, errors, warnings, checks: list,
      worst: worst.map((w) => ({
        step: String(w.step), check: String(w.check), severity: String(w.severity),
        keys: typeof w.keys === "string" ? (JSON.parse(w.keys) as Record<string, string>) : ((w.keys ?? {}) as Record<string, string>),
        year: w.year == null ? null : Number(w.year), residual: w.residual == null ? null : Number(w.residual), message: String(w.message),
      })),
    };
  }
}
