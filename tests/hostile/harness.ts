/**
 * The hostile-input suite's harness: a project folder with a valid pipeline and its data, a
 * snapshot of every file in it (to prove nothing outside the run was touched), and checks that
 * nothing half-written was published (the target is absent, a complete earlier run, or a
 * complete new one; a failed run is kept only as DIR.failed).
 */
import { spawnSync } from "node:child_process";
import { createHash } from "node:crypto";
import { existsSync, readdirSync, readFileSync, statSync } from "node:fs";
import path from "node:path";
import { expect } from "vitest";
import { CLI, tmp, write } from "../helpers.js";
import { BASE_FILES, BASE_YAML } from "../fixtures/broken.js";

export interface Project {
  dir: string;
  pipeline: string;
}

/** A project folder: pipelines/p.yaml, data/…, and a notes file that must survive everything. */
export function project(edit?: { yaml?: [string | RegExp, string][]; files?: Record<string, string> }): Project {
  const dir = tmp("cairn-hostile-");
  let yaml = BASE_YAML.replace(/path: (\w+)\.csv/g, "path: ../data/$1.csv");
  for (const [from, to] of edit?.yaml ?? []) {
    const before = yaml;
    yaml = yaml.replace(from, to);
    if (before === yaml) throw new Error(`edit did not apply: ${String(from)}`);
  }
  const data: Record<string, string> = {};
  for (const [f, text] of Object.entries({ ...BASE_FILES, ...(edit?.files ?? {}) })) data[`data/${f}`] = text;
  write(dir, { ...data, "pipelines/p.yaml": yaml, "notes.txt": "the user's own notes\n" });
  return { dir, pipeline: path.join(dir, "pipelines", "p.yaml") };
}

/** Every file below dir (relative path → size and SHA-256), skipping the given top-level names. */
export function snapshot(dir: string, skip: (rel: string) => boolean = () => false): Map<string, string> {
  const out = new Map<string, string>();
  const walk = (d: string) => {
    for (const e of readdirSync(d, { withFileTypes: true })) {
      const full = path.join(d, e.name);
      const rel = path.relative(dir, full);
      if (skip(rel)) continue;
      if (e.isDirectory()) walk(full);
      else if (e.isFile()) out.set(rel, `${statSync(full).size}:${createHash("sha256").update(readFileSync(full)).digest("hex")}`);
    }
  };
  walk(dir);
  return out;
}

/** Run outputs and the tool's own bookkeeping beside them are not "the user's files". */
export const runFiles = (names: string[]) => (rel: string) => names.some((n) => rel === n || rel.startsWith(n + path.sep) || rel.startsWith(n + ".failed") || rel.startsWith(`.${n}.`) || rel.includes(`${path.sep}.${path.basename(n)}.`));

export function expectUntouched(before: Map<string, string>, after: Map<string, string>): void {
  const changed = [...before.keys()].filter((k) => after.get(k) !== before.get(k));
  const added = [...after.keys()].filter((k) => !before.has(k));
  expect({ changed, added }).toEqual({ changed: [], added: [] });
}

export function cairn(args: string[], cwd: string, env: Record<string, string> = {}): { code: number; stdout: string; stderr: string } {
  const r = spawnSync(process.execPath, [CLI, ...args], { cwd, encoding: "utf8", env: { ...process.env, FORCE_COLOR: "0", ...env } });
  return { code: r.status ?? -1, stdout: r.stdout, stderr: r.stderr };
}

/** The target holds nothing half-written: absent, or a complete run whose manifest lists every file with its hash. */
export function expectWholeOrAbsent(target: string): void {
  if (!existsSync(target)) return;
  const m = JSON.parse(readFileSync(path.join(target, "manifest.json"), "utf8")) as { status: string; outputs: { file: string; sha256: string }[] };
  expect(m.status).toBe("ok");
  for (const o of m.outputs) {
    expect(createHash("sha256").update(readFileSync(path.join(target, o.file))).digest("hex"), o.file).toBe(o.sha256);
  }
}
