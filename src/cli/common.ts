import { InvalidArgumentError } from "commander";

export function collect(value: string, previous: string[]): string[] {
  return [...previous, value];
}

export function fail(e: unknown, json: boolean, code: number): never {
  const msg = (e as Error).message ?? String(e);
  if (json) process.stdout.write(JSON.stringify({ status: "failed", exit_code: code, error: msg }) + "\n");
  process.stderr.write(`cairn: ${msg}\n`);
  process.exit(code);
}

/** --threads: a whole number of threads, 1 to 1024. */
export function parseThreads(v: string): number {
  if (!/^\d+$/.test(v.trim()) || Number(v) < 1 || Number(v) > 1024) throw new InvalidArgumentError(`expected a whole number of threads from 1 to 1024, got ${JSON.stringify(v)}`);
  return Number(v);
}

const SIZE = /^\s*(\d+(?:\.\d+)?)\s*(B|KB|MB|GB|TB|KiB|MiB|GiB|TiB)\s*$/i;

/** --memory-limit: a positive size with a unit, as DuckDB takes it (e.g. 4GB, 512MiB). */
export function parseSize(v: string): string {
  const m = SIZE.exec(v);
  if (!m || !(Number(m[1]) > 0)) throw new InvalidArgumentError(`expected a positive size with a unit (B, KB, MB, GB, TB, KiB, MiB, GiB, TiB), e.g. 4GB; got ${JSON.stringify(v)}`);
  return `${m[1]}${m[2]!.toUpperCase().replace("IB", "iB")}`;
}

/** A folder or file path option: not empty. */
export function parsePath(v: string): string {
  if (!v.trim()) throw new InvalidArgumentError("expected a path, got an empty string");
  return v;
}
