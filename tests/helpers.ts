import { spawnSync, type SpawnSyncReturns } from "node:child_process";
import { mkdirSync, mkdtempSync, writeFileSync } from "node:fs";
import { tmpdir } from "node:os";
import path from "node:path";
import { fileURLToPath } from "node:url";

export const ROOT = path.resolve(path.dirname(fileURLToPath(import.meta.url)), "..");
export const CLI = path.join(ROOT, "dist", "cli", "main.js");

export function tmp(prefix = "cairn-test-"): string {
  return mkdtempSync(path.join(tmpdir(), prefix));
}

export function write(dir: string, files: Record<string, string>): void {
  for (const [name, text] of Object.entries(files)) {
    const p = path.join(dir, name);
    mkdirSync(path.dirname(p), { recursive: true });
    writeFileSync(p, text);
  }
}

export function cli(args: string[], cwd = ROOT): SpawnSyncReturns<string> & { code: number } {
  const r = spawnSync(process.execPath, [CLI, ...args], { cwd, encoding: "utf8", env: { ...process.env, FORCE_COLOR: "0" } });
  return Object.assign(r, { code: r.status ?? -1 });
}

/** A small valid pipeline around production/trade CSVs, for variations. */
export const BASIC_SOURCES = `
sources:
  production:
    path: production.csv
    unit: t
    columns:
      region: { type: text, key: true }
      commodity: { type: text, key: true }
      year: { type: integer, key: true }
      quantity: quantity
  trade:
    path: trade.csv
    unit: t
    columns:
      reporter: { type: text, key: true }
      partner: { type: text, key: true }
      commodity: { type: text, key: true }
      flow: { type: text, key: true }
      year: { type: integer, key: true }
      quantity: quantity
`;
