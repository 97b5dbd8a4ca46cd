/**
 * The yearly refresh: releases in a catalog, input changes and revisions with their causes
 * against a hand-computed case, re-use of unchanged steps (byte-identical to a full run), the
 * plan, and a catalog that concurrent and killed releases cannot corrupt.
 */
import { describe, expect, it } from "vitest";
import { spawn } from "node:child_process";
import { createHash } from "node:crypto";
import { existsSync, readdirSync, readFileSync, writeFileSync } from "node:fs";
import path from "node:path";
import { CLI, cli, tmp, write } from "../helpers.js";
import { Session } from "../../src/engine/session.js";

const PIPE = `name: refresh
catalog: catalog
sources:
  production: { path: "\${data}/production.csv", unit: t, columns: { region: {type: text, key: true}, commodity: {type: text, key: true}, year: {type: integer, key: true}, quantity: quantity } }
  trade: { path: "\${data}/trade.csv", unit: t, columns: { reporter: {type: text, key: true}, partner: {type: text, key: true}, commodity: {type: text, key: true}, flow: {type: text, key: true}, year: {type: integer, key: true}, quantity: quantity } }
  lifetimes: { path: "\${data}/lifetimes.csv", columns: { commodity: {type: text, nullable: true}, distribution: text, mean: {type: number, nullable: true} } }
  groups: { path: "\${data}/groups.csv", columns: { member: text, group: text } }
variables: { data: r1 }
steps:
  - { id: consumption, kind: apparent-consumption, production: production, trade: trade }
  - { id: inflow, kind: sql, inputs: [consumption], query: "SELECT region, commodity, year, consumption AS value, unit FROM consumption", columns: [region, commodity, year, value, unit] }
  - { id: stocks, kind: cohort-model, mode: inflow-driven, input: inflow, keys: [region, commodity], lifetimes: lifetimes, indicators: false }
  - { id: world, kind: aggregate, input: consumption, groups: groups, values: [consumption] }
`;
const R1 = {
  "r1/production.csv": "region,commodity,year,quantity\nA,c1,2000,100\nA,c1,2001,100\nA,c1,2002,100\nA,c2,2000,50\nA,c2,2001,50\nA,c2,2002,50\nB,c1,2000,10\nB,c1,2001,10\nB,c1,2002,10\n",
  "r1/trade.csv": "reporter,partner,commodity,flow,year,quantity\nA,B,c1,export,2001,20\nB,A,c1,import,2001,20\n",
  "r1/lifetimes.csv": "commodity,distribution,mean\nc1,fixed,10\nc2,fixed,2\n",
  "r1/groups.csv": "member,group\nA,WORLD\nB,WORLD\nC,WORLD\n",
};
// Release 2: one production row changed (A, c1, 2001: 100 → 130), one added (C, c1, 2002), the trade
// of 2001 withdrawn by both sides, and the lifetime of c2 changed (fixed 2 → 3 years).
const R2 = {
  "r2/production.csv": R1["r1/production.csv"].replace("A,c1,2001,100", "A,c1,2001,130") + "C,c1,2002,40\n",
  "r2/trade.csv": "reporter,partner,commodity,flow,year,quantity\n",
  "r2/lifetimes.csv": "commodity,distribution,mean\nc1,fixed,10\nc2,fixed,3\n",
  "r2/groups.csv": R1["r1/groups.csv"],
};

async function rows(sql: string): Promise<Record<string, unknown>[]> {
  const s = await Session.open();
  try {
    return await s.all(sql);
  } finally {
    s.close();
  }
}

function sha(f: string): string {
  return createHash("sha256").update(readFileSync(f)).digest("hex");
}

function release(dir: string, data: string, id: string, extra: string[] = []) {
  return cli(["run", path.join(dir, "p.yaml"), "--set", `data=${data}`, "--release", id, "--quiet", ...extra], dir);
}

describe("releases, input changes and revisions (hand-computed case)", () => {
  it("names each change and the cause of each revision", async () => {
    const dir = tmp("cairn-refresh-");
    write(dir, { "p.yaml": PIPE, ...R1, ...R2, "r2/trade.csv": "reporter,partner,commodity,flow,year,quantity\n" });
    // An empty trade table is allowed on purpose in release 2.
    writeFileSync(path.join(dir, "p.yaml"), PIPE.replace('trade: { path: "${data}/trade.csv",', 'trade: { path: "${data}/trade.csv", allow_empty: true,'));
    const a = release(dir, "r1", "2024");
    expect(a.code, a.stderr).toBe(0);
    const b = release(dir, "r2", "2025");
    expect(b.code, b.stderr).toBe(0);
    const cat = JSON.parse(readFileSync(path.join(dir, "catalog", "catalog.json"), "utf8"));
    expect(cat.latest).toBe("2025");
    expect(cat.releases.map((r: { id: string }) => r.id)).toEqual(["2024", "2025"]);
    expect(cat.releases[1].previous).toBe("2024");
    const c = path.join(dir, "catalog", "2025");
    // Input changes, per source.
    expect(await rows(`SELECT region, commodity, year, change, "column", old, new FROM '${c}/changes/production.parquet' ORDER BY ALL`)).toEqual([
      { region: "A", commodity: "c1", year: 2001, change: "changed", column: "quantity", old: "100.0", new: "130.0" },
      { region: "C", commodity: "c1", year: 2002, change: "added", column: null, old: null, new: "quantity=40.0, unit=t" },
    ]);
    expect((await rows(`SELECT change FROM '${c}/changes/trade.parquet'`)).map((r) => r.change)).toEqual(["removed", "removed"]);
    // Consumption: A, c1, 2001 was 100 − 20 (export) = 80, now 130: +50, from production and trade;
    // B, c1, 2001 was 10 + 20 (import) = 30, now 10: −20, from trade; C, c1, 2002 is new.
    const cons = await rows(`SELECT region, commodity, year, previous, new, revision, cause, sources FROM '${c}/revisions/consumption.parquet' WHERE variable = 'consumption' ORDER BY ALL`);
    expect(cons).toEqual([
      { region: "A", commodity: "c1", year: 2001, previous: 80, new: 130, revision: 50, cause: "input", sources: "production, trade" },
      { region: "B", commodity: "c1", year: 2001, previous: 30, new: 10, revision: -20, cause: "input", sources: "trade" }, // production changed in A and C only
      { region: "C", commodity: "c1", year: 2002, previous: null, new: 40, revision: null, cause: "new", sources: null },
    ]);
    // Stocks (fixed lifetimes; midpoint convention: a 3-year lifetime leaves 3 years after entry, a 2-year one 2 years after):
    // c1 nothing leaves within 2000–2002, so A's stock rises by 50 from 2001; c2 (2 → 3 years):
    // the 2000 cohort (50 t) left in 2002 under the old lifetime and stays under the new one.
    const st = await rows(`SELECT region, commodity, year, variable, previous, new, cause FROM '${c}/revisions/stocks.parquet' WHERE variable IN ('stock', 'outflow') AND NOT (cause = 'new' AND new = 0) ORDER BY ALL`); // C's years before its first inflow are new zeros
    expect(st).toEqual([
      { region: "A", commodity: "c1", year: 2001, variable: "stock", previous: 180, new: 230, cause: "input" },
      { region: "A", commodity: "c1", year: 2002, variable: "stock", previous: 280, new: 330, cause: "input" },
      { region: "A", commodity: "c2", year: 2002, variable: "outflow", previous: 50, new: 0, cause: "method" },
      { region: "A", commodity: "c2", year: 2002, variable: "stock", previous: 100, new: 150, cause: "method" },
      { region: "B", commodity: "c1", year: 2001, variable: "stock", previous: 40, new: 20, cause: "input" },
      { region: "B", commodity: "c1", year: 2002, variable: "stock", previous: 50, new: 30, cause: "input" },
      { region: "C", commodity: "c1", year: 2002, variable: "stock", previous: null, new: 40, cause: "new" },
    ]);
    // The revision audit flags past years revised by more than 5 % (the newest data year is 2002).
    const au = await rows(`SELECT step, "check", year, observed FROM '${c}/audit.parquet' WHERE "check" LIKE 'revision:%' AND row_kind = 'item' ORDER BY ALL`);
    // consumption: A's production, exports and consumption, B's imports and consumption (5); inflow: A and B (2);
    // stocks: inflow, stock and stock change of A and of B (6); world: the WORLD total (1). Stocks of 2002 are the newest year.
    const count = (c: string) => au.filter((x) => x.check === c && x.year === 2001).length;
    expect([count("revision:consumption"), count("revision:inflow"), count("revision:stocks"), count("revision:world"), au.length]).toEqual([5, 2, 6, 1, 14]);
    // cairn diff gives the largest revisions of two run directories.
    const d = cli(["diff", path.join(dir, "catalog", "2024"), c, "--table", "consumption", "--top", "1"]);
    expect(d.code, d.stderr).toBe(0);
    // From the two directories alone, the causes are the sources whose files changed upstream of the table.
    expect(d.stdout).toBe("consumption: the 1 largest revision(s)\n  region=A, commodity=c1, year=2001 consumption: 80 → 130 (62.50 %)  input (production, trade)\n");
    // cairn releases lists both, the latest marked.
    const l = cli(["releases", path.join(dir, "catalog")]);
    expect(l.stdout).toMatch(/\* 2025 .* published .*compared with 2024/);
    expect(readFileSync(path.join(c, "run.log"), "utf8")).toMatch(/^\d{4}-\d\d-\d\dT[\d:.]+Z source production: loading/);
  }, 120_000);
});

describe("re-use of unchanged work", () => {
  it("takes unchanged steps from the previous release, byte-identical to a full run", async () => {
    const dir = tmp("cairn-reuse-");
    write(dir, { "p.yaml": PIPE, ...R1, "r3/production.csv": R1["r1/production.csv"], "r3/trade.csv": R1["r1/trade.csv"], "r3/lifetimes.csv": R2["r2/lifetimes.csv"], "r3/groups.csv": R1["r1/groups.csv"] });
    expect(release(dir, "r1", "a").code).toBe(0);
    // Only the lifetimes changed: consumption, inflow and world are taken over; stocks is computed.
    const plan = cli(["plan", path.join(dir, "p.yaml"), "--set", "data=r3", "--against", path.join(dir, "catalog"), "--json"]);
    expect(plan.code, plan.stderr).toBe(0);
    const p = JSON.parse(plan.stdout);
    expect(Object.fromEntries(p.steps.map((x: { id: string; reused: boolean }) => [x.id, x.reused]))).toEqual({ consumption: true, inflow: true, stocks: false, world: true });
    expect(p.sources.find((x: { name: string }) => x.name === "lifetimes").changed).toBe(true);
    const b = release(dir, "r3", "b");
    expect(b.code, b.stderr).toBe(0);
    const m = JSON.parse(readFileSync(path.join(dir, "catalog", "b", "manifest.json"), "utf8"));
    expect(m.steps.filter((x: { reused: boolean }) => x.reused).map((x: { id: string }) => x.id)).toEqual(["consumption", "inflow", "world"]);
    // The same release computed in full, against the same previous release.
    const full = cli(["run", path.join(dir, "p.yaml"), "--set", "data=r3", "--out", path.join(dir, "full"), "--against", path.join(dir, "catalog", "a"), "--no-reuse", "--quiet"], dir);
    expect(full.code, full.stderr).toBe(0);
    const files = (d: string) => m.outputs.map((o: { file: string }) => o.file).filter((f: string) => !f.startsWith("inputs/")).sort();
    for (const f of files(path.join(dir, "catalog", "b"))) expect(sha(path.join(dir, "full", f)), f).toBe(sha(path.join(dir, "catalog", "b", f)));
  }, 120_000);
});

describe("a catalog under concurrent and failing releases", () => {
  it("two releases at once: one publishes, the other stops with exit 5; the index lists one", async () => {
    const dir = tmp("cairn-cat-");
    write(dir, { "p.yaml": PIPE, ...R1 });
    const go = (id: string) => new Promise<{ code: number; err: string }>((resolve) => {
      const ch = spawn(process.execPath, [CLI, "run", path.join(dir, "p.yaml"), "--release", id, "--quiet"], { cwd: dir });
      const exited = new Promise((r) => ch.on("exit", r));
      let err = "";
      ch.stderr.on("data", (x) => (err += x));
      ch.on("exit", (code) => resolve({ code: code ?? -1, err }));
    });
    const [x, y] = await Promise.all([go("one"), go("two")]);
    expect([x.code, y.code].sort()).toEqual([0, 5]);
    expect((x.code === 5 ? x : y).err).toMatch(/catalog .*catalog is in use by another run: pid \d+/);
    const idx = JSON.parse(readFileSync(path.join(dir, "catalog", "catalog.json"), "utf8"));
    expect(idx.releases).toHaveLength(1);
    expect(existsSync(path.join(dir, "catalog", idx.latest, "manifest.json"))).toBe(true);
  }, 60_000);

  it("a release that fails, runs out of disk or is killed never becomes the latest and leaves the index as it was", async () => {
    const dir = tmp("cairn-cat-");
    write(dir, { "p.yaml": PIPE, ...R1, "bad/production.csv": "region,commodity,year,quantity\nA,c1,2000,x\n", "bad/trade.csv": R1["r1/trade.csv"], "bad/lifetimes.csv": R1["r1/lifetimes.csv"], "bad/groups.csv": R1["r1/groups.csv"] });
    expect(release(dir, "r1", "good").code).toBe(0);
    const index = path.join(dir, "catalog", "catalog.json");
    const before = readFileSync(index, "utf8");
    expect(release(dir, "bad", "broken").code).toBe(3);
    expect(readFileSync(index, "utf8")).toBe(before);
    expect(existsSync(path.join(dir, "catalog", "broken.failed"))).toBe(true);
    const enospc = spawnSyncEnv(dir, ["run", path.join(dir, "p.yaml"), "--release", "disk", "--quiet"], { CAIRN_FAULT: "before-publish:enospc" });
    expect(enospc).toBe(7);
    expect(readFileSync(index, "utf8")).toBe(before);
    for (const delay of [150, 400, 700, 1000, 1300]) {
      const ch = spawn(process.execPath, [CLI, "run", path.join(dir, "p.yaml"), "--release", `k${delay}`, "--quiet"], { cwd: dir, stdio: "ignore" });
      const exited = new Promise((r) => ch.on("exit", r));
      await new Promise((r) => setTimeout(r, delay));
      ch.kill("SIGKILL");
      await exited;
      const idx = JSON.parse(readFileSync(index, "utf8"));
      // Either untouched, or the killed release made it in full (killed after the index was renamed).
      if (readFileSync(index, "utf8") !== before) {
        expect(idx.latest).toBe(`k${delay}`);
        expect(JSON.parse(readFileSync(path.join(dir, "catalog", idx.latest, "manifest.json"), "utf8")).status).toBe("ok");
      }
      for (const r of idx.releases) expect(existsSync(path.join(dir, "catalog", r.id, "manifest.json"))).toBe(true);
    }
    // The next release cleans up after the killed ones and publishes.
    expect(release(dir, "r1", "after").code).toBe(0);
    expect(readdirSync(path.join(dir, "catalog")).filter((f) => f.startsWith(".") || f.includes(".tmp-"))).toEqual([]);
  }, 120_000);
});

import { spawnSync } from "node:child_process";
function spawnSyncEnv(cwd: string, args: string[], env: Record<string, string>): number {
  return spawnSync(process.execPath, [CLI, ...args], { cwd, env: { ...process.env, ...env }, stdio: "ignore" }).status ?? -1;
}
