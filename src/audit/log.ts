/**
 * Audit records (DESIGN.md, "Audits"): every failing item is its own row; each
 * check that ran adds one summary row (items checked, worst residual).
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
}

export interface CheckResult {
  check: string;
  severity: "error" | "warning";
  items: number;
  failed: number;
}

export interface AuditSummary {
  rows: number;
  checks: { step: string; check: string; severity: string; items: number; failed: number; worst_residual: number | null }[];
  errors: number;
  warnings: number;
  worst: { step: string; check: string; keys: Record<string, string>; year: number | null; residual: number; message: string }[];
}

export class AuditLog {
  private stepIndex = 0;
  readonly failedErrors: { step: string; check: string; failed: number; example: string }[] = [];

  constructor(private readonly s: Session) {}

  async init(): Promise<void> {
    await this.s.run(`CREATE OR REPLACE TABLE ${AUDIT_TABLE} (
      step_index INTEGER, step VARCHAR, "check" VARCHAR, severity VARCHAR, status VARCHAR,
      keys MAP(VARCHAR, VARCHAR), year INTEGER, observed DOUBLE, expected DOUBLE, residual DOUBLE,
      tolerance DOUBLE, message VARCHAR)`);
  }

  setStepIndex(i: number): void {
    this.stepIndex = i;
  }

  async check(c: CheckSpec): Promise<CheckResult> {
    const fail = c.failWhen ?? "abs(observed - expected) > tolerance";
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
      max(abs(residual)) FILTER (WHERE NOT __fail) AS worst FROM ${tmp}`);
    const n = Number(r.n);
    const failed = Number(r.f);
    if (failed > 0) {
      // Failing items with their keys and message: the items query again, for them only.
      await this.s.run(`CREATE OR REPLACE TEMP TABLE ${tmp} AS SELECT * FROM (${items("keys, CAST(message AS VARCHAR) AS message")}) WHERE __fail`);
      await this.s.run(`INSERT INTO ${AUDIT_TABLE}
        SELECT ${head}, 'fail', keys, year, observed, expected, residual, tolerance, coalesce(message, ${lit(c.failMessage)})
        FROM ${tmp}`);
    }
    await this.s.run(`INSERT INTO ${AUDIT_TABLE} VALUES (${head}, 'pass', MAP {}, NULL, ${n - failed}, ${n}, ${
      r.worst === null ? "NULL" : lit(Number(r.worst))
    }, NULL, ${lit(`${n} items checked, ${n - failed} passed, ${failed} failed`)})`);
    if (failed > 0 && c.severity === "error") {
      const ex = await this.s.one(`SELECT CAST(keys AS VARCHAR) AS k, year, coalesce(message, ${lit(c.failMessage)}) AS m FROM ${tmp}
        ORDER BY CAST(keys AS VARCHAR), year LIMIT 1`);
      this.failedErrors.push({ step: c.step, check: c.check, failed, example: `${ex.k}${ex.year == null ? "" : ` year ${ex.year}`}: ${ex.m}` });
    }
    await this.s.run(`DROP TABLE ${tmp}`);
    return { check: c.check, severity: c.severity, items: n, failed };
  }

  /** One free-standing audit row (e.g. a rejected-rows count). */
  async note(step: string, check: string, severity: "error" | "warning", status: "pass" | "fail", message: string,
    observed: number | null = null, expected: number | null = null): Promise<void> {
    await this.s.run(`INSERT INTO ${AUDIT_TABLE} VALUES (${this.stepIndex}, ${lit(step)}, ${lit(check)}, ${lit(severity)}, ${lit(status)},
      MAP {}, NULL, ${lit(observed)}, ${lit(expected)}, ${observed !== null && expected !== null ? lit(observed - expected) : "NULL"}, NULL, ${lit(message)})`);
    if (status === "fail" && severity === "error") this.failedErrors.push({ step, check, failed: 1, example: message });
  }

  /** The ordered audit table, as SQL, for publishing. */
  orderedSql(): string {
    return `SELECT step, "check", severity, status, keys, year, observed, expected, residual, tolerance, message
      FROM ${AUDIT_TABLE} ORDER BY step_index, step, "check", status DESC, CAST(keys AS VARCHAR), year, message, observed`;
  }

  async summary(worstN = 5): Promise<AuditSummary> {
    const checks = await this.s.all(`SELECT step, "check", severity,
        sum(CASE WHEN status = 'pass' AND year IS NULL AND keys = MAP {} AND expected IS NOT NULL AND message LIKE '% items checked%' THEN expected ELSE 0 END) AS items,
        count(*) FILTER (WHERE status = 'fail') AS failed,
        max(abs(residual)) AS worst_residual, min(step_index) AS si
      FROM ${AUDIT_TABLE} GROUP BY ALL ORDER BY si, step, "check"`);
    const worst = await this.s.all(`SELECT step, "check", CAST(keys AS JSON) AS keys, year, residual, message FROM ${AUDIT_TABLE}
      WHERE status = 'fail' ORDER BY severity = 'error' DESC, abs(coalesce(residual, 0)) DESC, step, "check", CAST(keys AS VARCHAR), year LIMIT ${worstN}`);
    const rows = Number(await this.s.scalar(`SELECT count(*) FROM ${AUDIT_TABLE}`));
    let errors = 0;
    let warnings = 0;
    for (const c of checks) {
      if (Number(c.failed) > 0) c.severity === "error" ? (errors += Number(c.failed)) : (warnings += Number(c.failed));
    }
    return {
      rows,
      errors,
      warnings,
      checks: checks.map((c) => ({
        step: String(c.step), check: String(c.check), severity: String(c.severity), items: Number(c.items),
        failed: Number(c.failed), worst_residual: c.worst_residual == null ? null : Number(c.worst_residual),
      })),
      worst: worst.map((w) => ({
        step: String(w.step), check: String(w.check),
        keys: typeof w.keys === "string" ? (JSON.parse(w.keys) as Record<string, string>) : ((w.keys ?? {}) as Record<string, string>),
        year: w.year == null ? null : Number(w.year), residual: Number(w.residual ?? 0), message: String(w.message),
      })),
    };
  }
}
