export function collect(value: string, previous: string[]): string[] {
  return [...previous, value];
}

export function fail(e: unknown, json: boolean, code: number): never {
  const msg = (e as Error).message ?? String(e);
  if (json) process.stdout.write(JSON.stringify({ status: "failed", exit_code: code, error: msg }) + "\n");
  process.stderr.write(`cairn: ${msg}\n`);
  process.exit(code);
}
