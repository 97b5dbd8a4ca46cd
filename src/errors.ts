/** Errors that map to the documented exit codes (DESIGN.md, "Data contracts"; README, "Exit codes"). */

export const EXIT = {
  ok: 0,
  internal: 1,
  pipeline: 2,
  data: 3,
  audit: 4,
  /** Another run holds the target (or the catalog). */
  busy: 5,
  /** The engine ran out of memory. */
  memory: 6,
  /** A disk filled up, or spilling to disk failed. */
  disk: 7,
  /** An input file changed while the run read it. */
  changed: 8,
  /** A cluster job failed (sharded runs). */
  cluster: 9,
} as const;

export class CairnError extends Error {
  readonly exitCode: number;
  constructor(message: string, exitCode: number) {
    super(message);
    this.exitCode = exitCode;
    this.name = new.target.name;
  }
}

/** The pipeline file or the invocation is invalid (exit 2). */
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

/** The target or catalog is locked by another run (exit 5). */
export class TargetBusy extends CairnError {
  constructor(message: string) {
    super(message, EXIT.busy);
  }
}

/** Out of memory (exit 6) or out of disk / a failed spill (exit 7): never bad data. */
export class ResourceError extends CairnError {
  constructor(message: string, readonly kind: "memory" | "disk") {
    super(message, kind === "memory" ? EXIT.memory : EXIT.disk);
  }
}

/** An input file changed during the run (exit 8). */
export class InputChanged extends CairnError {
  constructor(message: string) {
    super(message, EXIT.changed);
  }
}

export function exitCodeOf(err: unknown): number {
  return err instanceof CairnError ? err.exitCode : EXIT.internal;
}

/** Where a run spills and writes, for the advice in resource messages. */
export interface ResourceContext {
  memoryLimit?: string;
  tempDir?: string;
  outDir?: string;
}

/**
 * A resource failure behind an engine or file-system error (out of memory, no space left), as
 * a ResourceError naming the limit or folder and what to change; undefined for anything else.
 */
export function resourceFailure(e: unknown, ctx: ResourceContext = {}): ResourceError | undefined {
  const msg = String((e as Error)?.message ?? e);
  const code = (e as NodeJS.ErrnoException)?.code;
  if (/Out of Memory Error|could not allocate block|failed to allocate|std::bad_alloc|memory limit/i.test(msg) && !/No space left/i.test(msg)) {
    return new ResourceError(
      `out of memory: the engine could not allocate what it needed under its memory limit (${ctx.memoryLimit ?? "DuckDB's default, 80 % of RAM"}) and could not spill enough to disk${ctx.tempDir ? ` (spill folder ${ctx.tempDir})` : ""}. ` +
        `Raise --memory-limit, lower --threads, or point --temp-dir at a folder with more free space. Engine message: ${firstLines(msg)}`, "memory");
  }
  if (code === "ENOSPC" || code === "EDQUOT" || /No space left on device|ENOSPC|disk quota|Could not write all bytes|Disk is full/i.test(msg)) {
    return new ResourceError(
      `out of disk space while writing${ctx.tempDir ? ` (spill folder ${ctx.tempDir}` : " ("}${ctx.outDir ? `${ctx.tempDir ? ", " : ""}run directory ${ctx.outDir})` : ")"}. ` +
        `Free space there, or point --temp-dir (spilling) or --out (the run directory) at a folder with more free space. Message: ${firstLines(msg)}`, "disk");
  }
  return undefined;
}

/** The first lines of an engine message (all of it up to a length), never just the first line. */
export function firstLines(msg: string, max = 1500): string {
  const m = msg.trim();
  return m.length > max ? m.slice(0, max) + " …" : m;
}
