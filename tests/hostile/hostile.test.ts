/**
 * The hostile-input suite: pipelines that try to reach outside the run, names that collide,
 * targets aimed at the wrong folders, bad command lines, bad and changing files, concurrent and
 * killed runs, a full disk and too little memory. Each case asserts the exit code, the message,
 * that nothing outside the run was touched, and that nothing half-written was published.
 */
import { describe, expect, it } from "vitest";
import { spawn } from "node:child_process";
import { existsSync, mkdirSync, readdirSync, readFileSync, renameSync, rmSync, symlinkSync, writeFileSync } from "node:fs";
import { hostname } from "node:os";
import { execFileSync } from "node:child_process";
import path from "node:path";
import { CLI } from "../helpers.js";
import { cairn, expectUntouched, expectWholeOrAbsent, project, runFiles, snapshot } from "./harness.js";

interface Case {
  name: string;
  edit?: Parameters<typeof project>[0];
  /** Command line after `cairn` (default: run the pipeline into runs/x). */
  args?: (p: { dir: string; pipeline: string }) => string[];
  prepare?: (p: { dir: string; pipeline: string }) => void;
  env?: (p: { dir: string; pipeline: string }) => Record<string, string>;
  code: number;
  message: RegExp;
}

const SQL = (query: string, inputs = "[stocks_by_cohort]"): Case["edit"] => ({
  yaml: [["    inputs: [stocks_by_cohort]\n    query: SELECT region, product, year, sum(stock) AS stock FROM stocks_by_cohort GROUP BY ALL\n", `    inputs: ${inputs}\n    query: "${query}"\n`]],
});
const FILTER = (f: string): Case["edit"] => ({ yaml: [["path: ../data/groups.csv\n", `path: ../data/groups.csv\n    filter: "${f}"\n`]] });
const ID = (from: string, to: string): Case["edit"] => ({ yaml: [[`id: ${from}\n`, `id: ${to}\n`]] });

const CASES: Case[] = [
  // Pipeline SQL that tries to reach outside the run (exit 2 before anything runs).
  { name: "sql: read_csv of a system file", edit: SQL("SELECT * FROM read_csv('/etc/passwd')"), code: 2, message: /table function read_csv\(\) reads outside the run/ },
  { name: "sql: read_parquet of an input by path", edit: SQL("SELECT * FROM read_parquet('../data/x.parquet')"), code: 2, message: /table function read_parquet\(\)/ },
  { name: "sql: read_text", edit: SQL("SELECT * FROM read_text('/etc/hostname')"), code: 2, message: /table function read_text\(\)/ },
  { name: "sql: a file named as a table (replacement scan)", edit: SQL("SELECT * FROM '/etc/passwd'"), code: 2, message: /reads "\/etc\/passwd", which is not listed in inputs/ },
  { name: "sql: a second statement (COPY)", edit: SQL("SELECT 1 AS a; COPY (SELECT 1) TO '/tmp/cairn-pwned.csv'"), code: 2, message: /only one SELECT is accepted/ },
  { name: "sql: ATTACH", edit: SQL("ATTACH '/tmp/cairn-pwned.db' AS x"), code: 2, message: /only one SELECT is accepted/ },
  { name: "sql: INSTALL an extension", edit: SQL("INSTALL httpfs"), code: 2, message: /only one SELECT is accepted/ },
  { name: "sql: LOAD an extension", edit: SQL("LOAD httpfs"), code: 2, message: /only one SELECT is accepted/ },
  { name: "sql: SET a setting", edit: SQL("SET enable_external_access = true"), code: 2, message: /only one SELECT is accepted/ },
  { name: "sql: PRAGMA", edit: SQL("PRAGMA database_list"), code: 2, message: /only one SELECT is accepted/ },
  { name: "sql: CREATE TABLE", edit: SQL("CREATE TABLE x AS SELECT 1"), code: 2, message: /only one SELECT is accepted/ },
  { name: "sql: DROP an earlier table", edit: SQL("DROP TABLE stocks"), code: 2, message: /only one SELECT is accepted/ },
  { name: "sql: a table not listed in inputs", edit: SQL("SELECT region, product, year, consumption AS stock FROM consumption"), code: 2, message: /reads "consumption", which is not listed in inputs \(stocks_by_cohort\)/ },
  { name: "sql: a schema-qualified table", edit: SQL("SELECT * FROM main.stocks_by_cohort"), code: 2, message: /names a schema or database/ },
  { name: "sql: a system table function", edit: SQL("SELECT * FROM duckdb_settings()"), code: 2, message: /table function duckdb_settings\(\)/ },
  { name: "sql: query() running text as SQL", edit: SQL("SELECT * FROM query('SELECT 1')"), code: 2, message: /table function query\(\)/ },
  { name: "sql: glob of a folder", edit: SQL("SELECT * FROM glob('/etc/*')"), code: 2, message: /table function glob\(\)/ },
  { name: "filter: closing the parenthesis to run a COPY", edit: FILTER("member <> 'X'); COPY (SELECT 1) TO '/tmp/cairn-pwned.csv' --"), code: 2, message: /a filter is one condition/ },
  { name: "filter: a subquery on another table", edit: FILTER("member IN (SELECT region FROM production)"), code: 2, message: /a filter reads only its own source's columns/ },
  { name: "filter: a subquery reading a file", edit: FILTER("member IN (SELECT column0 FROM read_csv('/etc/passwd'))"), code: 2, message: /reads only its own source's columns/ },
  { name: "filter: a second statement", edit: FILTER("TRUE; DROP TABLE production"), code: 2, message: /a filter is one condition/ },
  // Names of the tool's own tables and files, and collisions between steps.
  { name: "a step named rejects", edit: ID("by_group", "rejects"), code: 2, message: /"rejects", a name reserved/ },
  { name: "a step named audit", edit: ID("by_group", "audit"), code: 2, message: /"audit", a name reserved/ },
  { name: "a step named manifest", edit: ID("by_group", "manifest"), code: 2, message: /"manifest", a name reserved/ },
  { name: "a step with the internal prefix", edit: ID("by_group", "__cairn_audit"), code: 2, message: /"__cairn_audit", a name reserved/ },
  { name: "a step named like another step's materials table", edit: ID("cohort_check", "stocks_materials"), code: 2, message: /"stocks_materials", which step stocks already produces/ },
  { name: "a step named like another step's unmapped table", edit: ID("by_group", "consumption_unmapped"), code: 2, message: /"consumption_unmapped", which step consumption already produces/ },
  { name: "a step named like a source", edit: ID("by_group", "production"), code: 2, message: /steps\[1\]\.id: "production" is already the name of a source/ },
  { name: "a source named audit", edit: { yaml: [["  groups:\n    path", "  audit:\n    path"], ["groups: groups", "groups: audit"]] }, code: 2, message: /the name "audit" is reserved/ },
  // Targets aimed at the wrong folders (with --replace).
  { name: "--out . --replace", args: (p) => ["run", p.pipeline, "--out", ".", "--replace"], code: 2, message: /refused: it is the current directory or one of its parents/ },
  { name: "--out .. --replace", args: (p) => ["run", p.pipeline, "--out", "..", "--replace"], code: 2, message: /refused: it is the current directory or one of its parents/ },
  { name: "--out the data folder --replace", args: (p) => ["run", p.pipeline, "--out", "data", "--replace"], code: 2, message: /refused: it holds .*data\/production\.csv, which this run reads/ },
  { name: "--out the pipeline's folder --replace", args: (p) => ["run", p.pipeline, "--out", "pipelines", "--replace"], code: 2, message: /refused: it holds .*pipelines, which this run reads/ },
  { name: "--out a regular file --replace", args: (p) => ["run", p.pipeline, "--out", "notes.txt", "--replace"], code: 2, message: /refused: a file is there/ },
  { name: "--out an input file", args: (p) => ["run", p.pipeline, "--out", "data/production.csv"], code: 2, message: /refused: it holds .*production\.csv/ },
  { name: "--out a folder of the user's own --replace", prepare: (p) => writeFileSync(path.join(p.dir, "keep", "x.txt"), "mine"), args: (p) => ["run", p.pipeline, "--out", "keep", "--replace"], code: 2, message: /keep is not a cairn run directory/ },
  { name: "--out a symbolic link to the data --replace", prepare: (p) => symlinkSync(path.join(p.dir, "data"), path.join(p.dir, "link")), args: (p) => ["run", p.pipeline, "--out", "link", "--replace"], code: 2, message: /refused: (it holds|a symbolic link)/ },
  { name: "--out an existing run without --replace", prepare: (p) => { expect(cairn(["run", p.pipeline, "--out", "runs/x", "--quiet"], p.dir).code).toBe(0); }, code: 2, message: /already exists; pass --replace/ },
  // Command lines.
  { name: "--threads abc", args: (p) => ["run", p.pipeline, "--threads", "abc"], code: 2, message: /--threads <n>' argument 'abc' is invalid/ },
  { name: "--threads 0", args: (p) => ["run", p.pipeline, "--threads", "0"], code: 2, message: /whole number of threads from 1 to 1024/ },
  { name: "--memory-limit 200XB", args: (p) => ["run", p.pipeline, "--memory-limit", "200XB"], code: 2, message: /expected a positive size with a unit/ },
  { name: "--memory-limit -5GB", args: (p) => ["run", p.pipeline, "--memory-limit", "-5GB"], code: 2, message: /expected a positive size with a unit/ },
  { name: "--set without =", args: (p) => ["run", p.pipeline, "--set", "release"], code: 2, message: /--set release: expected NAME=value/ },
  { name: "--set of an undeclared variable", args: (p) => ["run", p.pipeline, "--set", "relase=2025"], code: 2, message: /--set relase: no such variable/ },
  { name: "an unknown option", args: (p) => ["run", p.pipeline, "--frobnicate"], code: 2, message: /unknown option '--frobnicate'/ },
  { name: "no pipeline file given", args: () => ["run"], code: 2, message: /missing required argument 'file'/ },
  { name: "a pipeline file that does not exist", args: () => ["run", "nope.yaml"], code: 2, message: /nope\.yaml: pipeline file not found/ },
  // Bad data files and small tables.
  { name: "a production file with a header and no rows", edit: { files: { "production.csv": "region,commodity,year,quantity\n" } }, code: 3, message: /source production: .*production\.csv has no data rows/ },
  { name: "binary garbage in a CSV file", edit: { files: { "trade.csv": "\u0000\u0001\u0002PK\u0003\u0004garbage\u00ff\n" } }, code: 3, message: /source trade: .*trade\.csv/ },
  { name: "a Parquet file that is not Parquet", edit: { yaml: [["path: ../data/groups.csv", "path: ../data/groups.parquet"]], files: { "groups.parquet": "this is not parquet" } }, code: 3, message: /source groups: cannot read .*groups\.parquet/ },
  { name: "NaN and infinite quantities", edit: { files: { "production.csv": "region,commodity,year,quantity\nA,c1,2000,NaN\nA,c1,2001,inf\n" } }, code: 3, message: /2 of 2 rows rejected/ },
  { name: "a quantity too large to sum exactly", edit: { files: { "production.csv": "region,commodity,year,quantity\nA,c1,2000,1e16\nA,c1,2001,110\n" } }, code: 3, message: /too large to sum exactly/ },
  { name: "duplicate rows in a groups table", edit: { files: { "groups.csv": "member,group\nA,WORLD\nB,WORLD\nA,WORLD\n" } }, code: 3, message: /groups\.csv, line 2 and .*groups\.csv, line 4: duplicate key: member=A, group=WORLD/ },
  { name: "duplicate content rows", edit: { files: { "content.csv": "product,material,first_cohort,last_cohort,content\ncars,steel,,,0.8\ncars,alu,,,0.2\nhouses,cement,,,1\nhouses,cement,,,1\n" } }, code: 3, message: /content\.csv, line 4 and .*content\.csv, line 5/ },
  { name: "an empty groups table allowed on purpose", edit: { yaml: [["path: ../data/groups.csv\n", "path: ../data/groups.csv\n    allow_empty: true\n"]], files: { "groups.csv": "member,group\n" } }, code: 0, message: /run complete/ },
  { name: "an alias bomb", edit: { yaml: [[/^/, "x: &a [1,1,1,1,1,1,1,1,1,1]\ny: &b [*a,*a,*a,*a,*a,*a,*a,*a,*a,*a]\nz: &c [*b,*b,*b,*b,*b,*b,*b,*b,*b,*b]\nw: [*c,*c,*c,*c,*c,*c,*c,*c,*c,*c]\n"]] }, code: 2, message: /alias expansions are accepted|unknown key/ },
  { name: "a pipeline file over 1 MiB", edit: { yaml: [[/^/, `# ${"x".repeat(1100 * 1024)}\n`]] }, code: 2, message: /at most 1048576 are accepted/ },
  { name: "a pipeline file with bytes that are not UTF-8 (hashed as bytes)", prepare: (p) => writeFileSync(p.pipeline, Buffer.concat([Buffer.from("# caf\xe9 \xff\xfe\n", "latin1"), readFileSync(p.pipeline)])), code: 0, message: /run complete/ },
  // Resources and faults during the run.
  { name: "too little memory", args: (p) => ["run", p.pipeline, "--out", "runs/x", "--memory-limit", "1MB"], code: 6, message: /out of memory: .*under its memory limit \(1MB\).*Raise --memory-limit/ },
  { name: "the disk fills up before publishing (injected)", env: () => ({ CAIRN_FAULT: "before-publish:enospc" }), code: 7, message: /out of disk space while writing/ },
  { name: "the engine runs out of memory in a step (injected)", env: () => ({ CAIRN_FAULT: "after-step:consumption:oom" }), code: 6, message: /out of memory/ },
  { name: "an input appended to during the run", env: (p) => ({ CAIRN_FAULT: `after-source:production:append:${path.join(p.dir, "data", "production.csv")}` }), code: 8, message: /source production: .*production\.csv changed during the run \(noticed [^:]+: size \d+ → \d+ bytes/ },
  { name: "an input replaced by another file during the run", prepare: (p) => writeFileSync(path.join(p.dir, "other.csv"), readFileSync(path.join(p.dir, "data", "trade.csv"))), env: (p) => ({ CAIRN_FAULT: `after-step:consumption:replace:${path.join(p.dir, "data", "trade.csv")}:${path.join(p.dir, "other.csv")}` }), code: 8, message: /trade\.csv changed during the run .*replaced by another file/ },
  { name: "a crash part-way leaves nothing at the target", env: () => ({ CAIRN_FAULT: "after-step:stocks:exit" }), code: -1, message: /^\s*$/ },
];

describe("hostile inputs: exit code, message, nothing outside the run touched, nothing half-written", () => {
  for (const c of CASES) {
    it(c.name, () => {
      const p = project(c.edit);
      mkdirSync(path.join(p.dir, "keep"), { recursive: true });
      c.prepare?.(p);
      const before = snapshot(p.dir, runFiles(["runs"]));
      const args = c.args?.(p) ?? ["run", p.pipeline, "--out", "runs/x"];
      const r = cairn([...args, "--quiet"].filter((a, i, all) => !(a === "--quiet" && all.indexOf("--quiet") !== i)), p.dir, c.env?.(p) ?? {});
      expect(r.code, r.stderr || r.stdout).toBe(c.code);
      expect(`${r.stdout}\n${r.stderr}`).toMatch(c.message);
      // The user's files (pipeline, data, notes, other folders) are exactly as before.
      const after = snapshot(p.dir, runFiles(["runs"]));
      if (c.name.includes("appended") || c.name.includes("replaced by another")) {
        // The case changes an input on purpose; everything else is untouched.
        for (const k of before.keys()) if (!k.startsWith("data/") && k !== "other.csv") expect(after.get(k), k).toBe(before.get(k));
      } else expectUntouched(before, after);
      const target = path.join(p.dir, "runs", "x");
      if (c.code !== 0 && !c.name.includes("without --replace")) expect(existsSync(target), "nothing published at the target").toBe(false);
      expectWholeOrAbsent(target);
      // No file was written outside the project by pipeline SQL.
      expect(existsSync("/tmp/cairn-pwned.csv") || existsSync("/tmp/cairn-pwned.db")).toBe(false);
    }, 60_000);
  }
});

describe("hostile runs: concurrency, locks and kills", () => {
  it("three runs started at once to a new target: one publishes, the others stop at once with exit 5 naming the holder", async () => {
    const p = project();
    const t0 = Date.now();
    const runs = [0, 1, 2].map(() => new Promise<{ code: number; out: string; ms: number }>((resolve) => {
      const child = spawn(process.execPath, [CLI, "run", p.pipeline, "--out", "runs/x", "--quiet"], { cwd: p.dir });
      let out = "";
      child.stdout.on("data", (d) => (out += d));
      child.stderr.on("data", (d) => (out += d));
      child.on("exit", (code) => resolve({ code: code ?? -1, out, ms: Date.now() - t0 }));
    }));
    const done = await Promise.all(runs);
    const codes = done.map((d) => d.code).sort();
    expect(codes).toEqual([0, 5, 5]);
    const winner = done.find((d) => d.code === 0)!;
    for (const d of done.filter((x) => x.code === 5)) {
      expect(d.out).toMatch(/run target .*runs\/x is in use by another run: pid \d+ on /);
      expect(d.ms).toBeLessThan(winner.ms); // they did not run in full
    }
    expectWholeOrAbsent(path.join(p.dir, "runs", "x"));
    expect(readdirSync(path.join(p.dir, "runs")).filter((f) => f.startsWith("."))).toEqual([]);
  }, 120_000);

  it("a lock held by a live process refuses the run; a lock left by a dead process is taken over", async () => {
    const p = project();
    mkdirSync(path.join(p.dir, "runs"), { recursive: true });
    const holder = spawn("sleep", ["30"]);
    const lock = path.join(p.dir, "runs", ".x.lock");
    writeFileSync(lock, JSON.stringify({ pid: holder.pid, host: hostname(), started_at: new Date().toISOString(), command: "another cairn run", target: "x" }));
    const busy = cairn(["run", p.pipeline, "--out", "runs/x", "--quiet"], p.dir);
    expect(busy.code).toBe(5);
    expect(busy.stderr).toContain(`pid ${holder.pid}`);
    holder.kill("SIGKILL");
    await new Promise((r) => holder.on("exit", r));
    const ok = cairn(["run", p.pipeline, "--out", "runs/x", "--quiet"], p.dir);
    expect(ok.code, ok.stderr).toBe(0);
    expect(existsSync(lock)).toBe(false);
  }, 60_000);

  it("runs killed at random points of a replacement leave the earlier run or a complete new one, and the next run cleans up", async () => {
    const p = project();
    expect(cairn(["run", p.pipeline, "--out", "runs/x", "--quiet"], p.dir).code).toBe(0);
    const before = snapshot(p.dir, runFiles(["runs"]));
    for (const delay of [200, 500, 800, 1100, 1400]) {
      const child = spawn(process.execPath, [CLI, "run", p.pipeline, "--out", "runs/x", "--replace", "--quiet"], { cwd: p.dir, stdio: "ignore" });
      const exited = new Promise((r) => child.on("exit", r));
      await new Promise((r) => setTimeout(r, delay + Math.floor(Math.random() * 200)));
      child.kill("SIGKILL");
      await exited;
      expect(existsSync(path.join(p.dir, "runs", "x", "manifest.json"))).toBe(true); // never absent
      expectWholeOrAbsent(path.join(p.dir, "runs", "x"));
    }
    expectUntouched(before, snapshot(p.dir, runFiles(["runs"])));
    expect(cairn(["run", p.pipeline, "--out", "runs/x", "--replace", "--quiet"], p.dir).code).toBe(0);
    expect(readdirSync(path.join(p.dir, "runs")).filter((f) => f.startsWith("."))).toEqual([]);
  }, 120_000);

  it("a crash part-way through a first run leaves no target, and the next run removes its staging", () => {
    const p = project();
    const r = cairn(["run", p.pipeline, "--out", "runs/x", "--quiet"], p.dir, { CAIRN_FAULT: "after-step:stocks:exit" });
    expect(r.code).toBe(-1); // killed
    expect(existsSync(path.join(p.dir, "runs", "x"))).toBe(false);
    expect(readdirSync(path.join(p.dir, "runs")).some((f) => f.includes("staging"))).toBe(true);
    expect(cairn(["run", p.pipeline, "--out", "runs/y", "--quiet"], p.dir).code).toBe(0);
    expect(readdirSync(path.join(p.dir, "runs")).filter((f) => f.startsWith("."))).toEqual([]);
  }, 60_000);
});

describe("hostile files: footer statistics and a full file system", () => {
  it("a Parquet file whose footer statistics hide negative values: every value is scanned, the rows rejected", () => {
    const p = project({ yaml: [["path: ../data/production.csv", "path: ../data/production.parquet"]] });
    const file = path.join(p.dir, "data", "production.parquet");
    // Written by DuckDB with negative quantities, then the footer's minimum patched to 1.0.
    execFileSync(process.execPath, ["-e", `
      const { DuckDBInstance } = require("@duckdb/node-api");
      (async () => { const c = await (await DuckDBInstance.create(":memory:")).connect();
        await c.run("COPY (SELECT 'A' AS region, 'c' || (i % 3) AS commodity, 1990 + (i // 3) AS year, CASE WHEN i % 10 = 0 THEN -1.5e299 ELSE i * 1.0 END AS quantity FROM range(90) t(i)) TO '${file}' (FORMAT parquet)");
        const fs = require("node:fs"); const b = fs.readFileSync("${file}"); const neg = Buffer.alloc(8); neg.writeDoubleLE(-1.5e299); const one = Buffer.alloc(8); one.writeDoubleLE(1);
        const footer = b.length - 8 - b.readUInt32LE(b.length - 8); // the footer only (metadata), not the data pages
        let n = 0; for (let i = footer; i + 8 <= b.length - 8; i++) if (b.subarray(i, i + 8).equals(neg)) { one.copy(b, i); n++; }
        if (n < 1) throw new Error("no statistic patched"); fs.writeFileSync("${file}", b); })();`], { cwd: path.resolve(CLI, "..", "..", "..") });
    const r = cairn(["run", p.pipeline, "--out", "runs/x", "--quiet"], p.dir);
    expect(r.code, r.stderr).toBe(3);
    expect(r.stdout + r.stderr).toMatch(/source production: 9 of 90 rows rejected/);
    expect(r.stdout + r.stderr).toMatch(/negative quantity/);
  }, 60_000);

  it("a full file system: exit 7 naming the folder, nothing left on it", (ctx) => {
    const p = project();
    const mnt = path.join(p.dir, "small");
    mkdirSync(mnt);
    try {
      execFileSync("mount", ["-t", "tmpfs", "-o", "size=48k", "tmpfs", mnt], { stdio: "pipe" });
    } catch {
      ctx.skip(); // mounting needs root; CI runs as root
      return;
    }
    try {
      const r = cairn(["run", p.pipeline, "--out", path.join(mnt, "run"), "--quiet"], p.dir);
      expect(r.code, r.stderr).toBe(7);
      expect(r.stderr).toMatch(/out of disk space while writing .*small/);
      expect(readdirSync(mnt)).toEqual([]);
    } finally {
      execFileSync("umount", [mnt]);
    }
  }, 60_000);
});

export const HOSTILE_CASES = CASES.length + 6;
void renameSync;
void rmSync;
