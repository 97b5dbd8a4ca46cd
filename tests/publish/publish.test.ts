import { describe, expect, it, beforeAll } from "vitest";
import { spawn } from "node:child_process";
import { createHash } from "node:crypto";
import { existsSync, readdirSync, readFileSync, cpSync, rmSync, writeFileSync } from "node:fs";
import path from "node:path";
import { parquetReadObjects } from "hyparquet";
import { compressors } from "hyparquet-compressors";
import { Session } from "../../src/engine/session.js";
import { CLI, ROOT, cli, tmp } from "../helpers.js";

const DEMO = path.join(ROOT, "pipelines", "demo.yaml");

function sha(file: string): string {
  return createHash("sha256").update(readFileSync(file)).digest("hex");
}

/** Every file below dir, relative, sorted. */
function files(dir: string): string[] {
  return (readdirSync(dir, { recursive: true, withFileTypes: true }) as import("node:fs").Dirent[])
    .filter((e) => e.isFile())
    .map((e) => path.relative(dir, path.join(e.parentPath ?? (e as unknown as { path: string }).path, e.name)))
    .sort();
}

async function readIndependent(file: string): Promise<Record<string, unknown>[]> {
  const buf = readFileSync(file);
  const ab = buf.buffer.slice(buf.byteOffset, buf.byteOffset + buf.byteLength);
  return (await parquetReadObjects({ file: ab, compressors })) as Record<string, unknown>[];
}

describe("publishing the demo run", () => {
  const base = tmp("cairn-pub-");
  const a = path.join(base, "a");
  const b = path.join(base, "b");
  beforeAll(() => {
    const r1 = cli(["run", DEMO, "--out", a, "--quiet"]);
    expect(r1.code, r1.stderr).toBe(0);
    const r2 = cli(["run", DEMO, "--out", b, "--quiet"]);
    expect(r2.code, r2.stderr).toBe(0);
  });

  it("Parquet outputs read back with an independent reader (hyparquet) equal what DuckDB reads (Apache Parquet format)", async () => {
    const s = await Session.open();
    for (const name of ["consumption.parquet", "stocks.parquet", "audit.parquet"]) {
      const ours = await readIndependent(path.join(a, name));
      const duck = await s.all(`SELECT * EXCLUDE (${name === "audit.parquet" ? "keys" : "unit"}) FROM read_parquet('${path.join(a, name)}')`);
      expect(ours.length).toBe(duck.length);
      for (let i = 0; i < duck.length; i += Math.max(1, Math.floor(duck.length / 50))) {
        for (const [k, v] of Object.entries(duck[i]!)) {
          const w = ours[i]![k];
          if (typeof v === "number") expect(Number(w)).toBe(v);
          else if (v === null) expect(w ?? null).toBeNull();
          else expect(String(w)).toBe(String(v));
        }
      }
    }
    s.close();
  });

  it("the manifest's hashes match the files, inputs included", () => {
    const m = JSON.parse(readFileSync(path.join(a, "manifest.json"), "utf8"));
    expect(m.tool.name).toBe("cairn");
    expect(m.engine.duckdb).toMatch(/^v1\./);
    expect(m.caution).toMatch(/estimates/);
    expect(m.outputs.length).toBeGreaterThan(5);
    for (const o of m.outputs) {
      expect(sha(path.join(a, o.file))).toBe(o.sha256);
      expect(o.rows).toBeGreaterThanOrEqual(0);
    }
    for (const i of m.inputs) {
      expect(sha(i.path)).toBe(i.sha256);
      expect(i.bytes).toBe(readFileSync(i.path).length);
    }
    const prod = m.inputs.find((i: { source: string }) => i.source === "production");
    expect(prod.rows).toBe(readFileSync(prod.path, "utf8").trim().split("\n").length - 1);
    expect(m.pipeline.sha256).toBe(sha(DEMO));
  });

  it("a re-run gives byte-identical tables", () => {
    const tables = files(a).filter((f) => f.endsWith(".parquet"));
    expect(tables).toEqual(files(b).filter((f) => f.endsWith(".parquet")));
    expect(tables).toContain("stocks_by_cohort.parquet");
    for (const f of tables) expect(sha(path.join(b, f)), f).toBe(sha(path.join(a, f)));
  });

  it("an existing run directory is refused without --replace, swapped with it", () => {
    const r = cli(["run", DEMO, "--out", a, "--quiet"]);
    expect(r.code).toBe(2);
    expect(r.stderr).toContain("already exists; pass --replace");
    const before = sha(path.join(a, "manifest.json"));
    const r2 = cli(["run", DEMO, "--out", a, "--quiet", "--replace"]);
    expect(r2.code).toBe(0);
    expect(sha(path.join(a, "manifest.json"))).not.toBe(before);
    expect(readdirSync(base).filter((f) => f.includes("staging") || f.includes(".old-"))).toEqual([]);
  });

  it("--json prints one machine-readable summary", () => {
    const out = path.join(base, "j");
    const r = cli(["run", DEMO, "--out", out, "--json"]);
    expect(r.code).toBe(0);
    const j = JSON.parse(r.stdout.trim().split("\n").pop()!);
    expect(j.status).toBe("ok");
    expect(j.audit.errors).toBe(0);
    expect(j.outputs.some((o: { file: string }) => o.file === "consumption.parquet")).toBe(true);
  });

  it("partitioned output writes one folder per key value", () => {
    const dir = tmp();
    cpSync(path.join(ROOT, "data-samples"), path.join(dir, "data-samples"), { recursive: true });
    const yaml = readFileSync(DEMO, "utf8").replace("    negative: flag\n", "    negative: flag\n    publish: { partition_by: [region] }\n");
    const p = path.join(dir, "pipelines", "demo.yaml");
    cpSync(DEMO, p);
    writeFileSync(p, yaml);
    const r = cli(["run", p, "--out", path.join(dir, "o"), "--quiet"]);
    expect(r.code, r.stderr).toBe(0);
    const parts = readdirSync(path.join(dir, "o", "consumption")).sort();
    expect(parts).toEqual(["region=ALD", "region=BRV", "region=COR", "region=DUN", "region=EST"]);
    const m = JSON.parse(readFileSync(path.join(dir, "o", "manifest.json"), "utf8"));
    const outs = m.outputs.filter((o: { table: string }) => o.table === "consumption");
    expect(outs.length).toBeGreaterThanOrEqual(5);
    for (const f of outs) expect(sha(path.join(dir, "o", f.file))).toBe(f.sha256);
  });
});

describe("a run killed part-way", () => {
  it("leaves no run directory, an earlier run untouched, and its staging cleaned by the next run", async () => {
    const base = tmp("cairn-kill-");
    const out = path.join(base, "run");
    const first = cli(["run", DEMO, "--out", out, "--quiet"]);
    expect(first.code).toBe(0);
    const before = Object.fromEntries(files(out).map((f) => [f, sha(path.join(out, f))]));
    const fresh = path.join(base, "fresh");
    for (const delay of [150, 400, 700, 1000]) {
      for (const [target, replace] of [[out, true], [fresh, false]] as const) {
        const child = spawn(process.execPath, [CLI, "run", DEMO, "--out", target, "--quiet", ...(replace ? ["--replace"] : [])], { stdio: "ignore" });
        const exited = new Promise((r) => child.on("exit", r));
        await new Promise((r) => setTimeout(r, delay));
        child.kill("SIGKILL");
        await exited;
        // The earlier run is complete and unchanged, or (if the kill came after the swap) a complete new run.
        if (existsSync(out)) {
          const now = files(out);
          expect(now).toContain("manifest.json");
          if (sha(path.join(out, "manifest.json")) === before["manifest.json"]) {
            for (const f of now) expect(sha(path.join(out, f))).toBe(before[f]);
          }
        }
        if (existsSync(fresh)) {
          expect(readdirSync(fresh)).toContain("manifest.json");
          rmSync(fresh, { recursive: true });
        }
      }
    }
    const again = cli(["run", DEMO, "--out", out, "--quiet", "--replace"]);
    expect(again.code).toBe(0);
    if (existsSync(fresh)) rmSync(fresh, { recursive: true });
    expect(cli(["run", DEMO, "--out", fresh, "--quiet"]).code).toBe(0);
    expect(readdirSync(base).filter((f) => f.startsWith("."))).toEqual([]);
  }, 180_000);
});
