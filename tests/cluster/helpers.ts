/** Helpers of the sharded-run tests: CLI runs in parallel, run directories compared byte for byte, the demo without Monte Carlo. */
import { spawn } from "node:child_process";
import { readdirSync, readFileSync, writeFileSync } from "node:fs";
import path from "node:path";
import { parse, stringify } from "yaml";
import { CLI, ROOT } from "../helpers.js";

export const DEMO = path.join(ROOT, "pipelines", "demo.yaml");
export const DEMO_DATA = path.join(ROOT, "data-samples", "demo");

export interface Ran {
  code: number;
  stdout: string;
  stderr: string;
}

export function cliAsync(args: string[], env: Record<string, string> = {}, cwd = ROOT): Promise<Ran> {
  return new Promise((resolve) => {
    const p = spawn(process.execPath, [CLI, ...args], { cwd, env: { ...process.env, FORCE_COLOR: "0", ...env } });
    let stdout = "";
    let stderr = "";
    p.stdout.on("data", (d) => (stdout += d));
    p.stderr.on("data", (d) => (stderr += d));
    p.on("close", (code) => resolve({ code: code ?? -1, stdout, stderr }));
  });
}

/** Runs the N shards of a pipeline, two at a time (the machine's cores), into dir/shard-K. */
export async function runShards(file: string, n: number, dir: string, extra: string[] = [], env: Record<string, string> = {}): Promise<Ran[]> {
  const out: Ran[] = [];
  for (let k = 0; k < n; k += 2) {
    const batch = [k, k + 1].filter((x) => x < n).map((x) => cliAsync(["run", file, "--shard", `${x}/${n}`, "--out", path.join(dir, `shard-${x}`), "--quiet", ...extra], env));
    out.push(...(await Promise.all(batch)));
  }
  return out;
}

/** Every published data file of a run directory (Parquet, Arrow, CSV), relative paths, sorted. */
export function dataFiles(dir: string, sub = ""): string[] {
  const out: string[] = [];
  for (const e of readdirSync(path.join(dir, sub), { withFileTypes: true })) {
    const rel = path.join(sub, e.name);
    if (e.isDirectory()) out.push(...dataFiles(dir, rel));
    else if (/\.(parquet|arrow|csv)$/.test(e.name)) out.push(rel);
  }
  return out.sort();
}

/** Files whose bytes differ between two run directories (and files only in one of them). */
export function differingFiles(a: string, b: string): string[] {
  const fa = dataFiles(a);
  const fb = dataFiles(b);
  const bad = [...fa.filter((f) => !fb.includes(f)), ...fb.filter((f) => !fa.includes(f)).map((f) => `${f} (only in ${b})`)];
  for (const f of fa.filter((x) => fb.includes(x))) if (!readFileSync(path.join(a, f)).equals(readFileSync(path.join(b, f)))) bad.push(f);
  return bad;
}

/** The demo pipeline without its Monte Carlo options (so its cohort models run in the shards), written into dir. */
export function demoWithoutMonteCarlo(dir: string): string {
  const doc = parse(readFileSync(DEMO, "utf8")) as { steps: Record<string, unknown>[]; variables?: Record<string, string>; exports?: Record<string, unknown>[] };
  for (const st of doc.steps) delete st.uncertainty;
  // Export options that name the Monte Carlo tables go too.
  const mc = (v: unknown) => /_uncertainty|_sensitivity/.test(JSON.stringify(v));
  for (const e of doc.exports ?? []) for (const k of Object.keys(e)) if (k !== "table" && mc(e[k])) delete e[k];
  doc.exports = doc.exports?.filter((e) => !mc(e.table));
  doc.variables = { ...doc.variables, data: DEMO_DATA };
  const file = path.join(dir, "demo-no-mc.yaml");
  writeFileSync(file, stringify(doc));
  return file;
}
