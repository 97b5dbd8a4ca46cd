/** Errors that map to the documented exit codes (DESIGN.md, "Data contracts"). */

export const EXIT = {
  ok: 0,
  internal: 1,
  pipeline: 2,
  data: 3,
  audit: 4,
} as const;

export class CairnError extends Error {
  readonly exitCode: number;
  constructor(message: string, exitCode: number) {
    super(message);
    this.exitCode = exitCode;
    this.name = new.target.name;
  }
}

/** The pipeline file is invalid (exit 2). */
export class PipelineError extends CairnError {
  constructor(message: string) {
    super(message, EXIT.pipeline);
  }
}

/** Input data cannot be used (exit 3). */
export class DataError extends CairnError {
  constructor(message: string) {
    super(message, EXIT.data);
  }
}

/** An audit of severity `error` failed (exit 4). */
export class AuditFailure extends CairnError {
  constructor(message: string) {
    super(message, EXIT.audit);
  }
}

export function exitCodeOf(err: unknown): number {
  return err instanceof CairnError ? err.exitCode : EXIT.internal;
}
