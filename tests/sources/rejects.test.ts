import { describe, expect, it } from "vitest";
import { existsSync, readFileSync, writeFileSync } from "node:fs";
import path from "node:path";
import { loadPipeline } from "../../src/spec/load.js";
import { runPipeline } from "../../src/run/runner.js";
import { Session } from "../../src/engine/session.js";
import { BASIC_SOURCES, cli, tmp, write } from "../helpers.js";

const PIPE = (extra = "") => `name: t\nyears: { first: 2000, last: 2010 }\n${extra}${BASIC_SOURCES}
steps:
  - id: consumption
    kind: apparent-consumption
    production: production
    trade: trade
`;
const GOOD_PROD = "region,commodity,year,quantity\nA,c1,2000,100\nB,c1,2000,50\n";
const GOOD_TRADE = "reporter,partner,commodity,flow,year,quantity\nA,B,c1,export,2000,10\nB,A,c1,import,2000,10\n";

async function run(files: Record<string, string>, extra = "") {
  const dir = tmp();
  write(dir, { "p.yaml": PIPE(extra), "production.csv": GOOD_PROD, "trade.csv": GOOD_TRADE, ...files });
  const out = path.join(dir, "out");
  try {
    const r = await runPipeline(loadPipeline(path.join(dir, "p.yaml")), { out });
    return { r, out, dir, err: null as Error | null };
  } catch (e) {
    return { r: null, out, dir, err: e as Error };
  }
}

async function rejects(dir: string): Promise<Record<string, unknown>[]> {
  const s = await Session.open();
  try {
    return await s.all(`SELECT * FROM read_parquet('${path.join(dir, "out.failed", "rejects.parquet")}') ORDER BY file, "row"`);
  } finally {
    s.close();
  }
}

describe("bad input data ends in rejects or clear errors", () => {
  it("wrong types, NaN/Inf, negatives, missing keys, out-of-horizon years and duplicates are rejected with file, row, line, column, value", async () => {
    const prod = [
      "region,commodity,year,quantity",
      "A,c1,2000,100", // ok (line 2)
      "B,c1,2000,abc", // not a number (line 3)
      "C,c1,2000,NaN", // not finite
      "D,c1,2000,inf",
      "E,c1,2000,-5", // negative
      ",c1,2000,5", // missing key
      "F,c1,1999,5", // outside horizon
      "G,c1,2000.5,5", // not whole
      "H,c1,2001,1",
      "H,c1,2001,2", // duplicate key (both rejected)
    ].join("\n") + "\n";
    const { r, out, dir } = await run({ "production.csv": prod });
    expect(r!.status).toBe("failed");
    expect(r!.exit_code).toBe(3);
    expect(existsSync(out)).toBe(false);
    expect(existsSync(out + ".failed")).toBe(true);
    const rows = await rejects(dir);
    expect(rows.length).toBe(9);
    const by = (line: number) => rows.find((x) => Number(x.line) === line)!;
    expect(by(3)).toMatchObject({ source: "production", column: "quantity", value: "abc", row: 2 });
    expect(String(by(3).reason)).toContain("quantity is not a number");
    expect(String(by(3).file)).toMatch(/production\.csv$/);
    expect(String(by(4).reason)).toContain("not finite");
    expect(String(by(5).reason)).toContain("not finite");
    expect(String(by(6).reason)).toContain("negative quantity");
    expect(by(7)).toMatchObject({ column: "region" });
    expect(String(by(7).reason)).toContain("missing key region");
    expect(String(by(8).reason)).toContain("year outside the horizon 2000..2010");
    expect(String(by(9).reason)).toContain("year is not a whole number");
    expect(String(by(10).reason)).toMatch(/duplicate key \(region=H, commodity=c1, year=2001\) occurs 2 times/);
    expect(String(by(11).reason)).toMatch(/duplicate key/);
    const manifest = JSON.parse(readFileSync(path.join(out + ".failed", "manifest.json"), "utf8"));
    expect(manifest.status).toBe("failed");
    expect(manifest.sources[0]).toMatchObject({ name: "production", rows_read: 10, rows_rejected: 9 });
  });

  it("rejects under the threshold let the run go on and are published", async () => {
    const prod = "region,commodity,year,quantity\nA,c1,2000,100\nB,c1,2000,oops\nB,c1,2001,50\n";
    const { r, out } = await run({ "production.csv": prod }, "rejects: { max_rows: 5 }\n");
    expect(r!.status).toBe("ok");
    expect(r!.rejects).toBe(1);
    const s = await Session.open();
    const rows = await s.all(`SELECT * FROM read_parquet('${out}/rejects.parquet')`);
    const audit = await s.all(`SELECT * FROM read_parquet('${out}/audit.parquet') WHERE "check" = 'rejected-rows' AND step = 'production'`);
    s.close();
    expect(rows).toHaveLength(1);
    expect(rows[0]).toMatchObject({ line: 3, column: "quantity", value: "oops" });
    expect(audit).toHaveLength(1);
    expect(audit[0]).toMatchObject({ status: "fail", items: 3, failed: 1 });
  });

  it("a share threshold", async () => {
    const prod = "region,commodity,year,quantity\nA,c1,2000,100\nB,c1,2000,oops\nB,c1,2001,50\nC,c1,2001,1\n";
    const ok = await run({ "production.csv": prod }, "rejects: { max_share: 0.3 }\n");
    expect(ok.r!.status).toBe("ok");
    const bad = await run({ "production.csv": prod }, "rejects: { max_share: 0.2 }\n");
    expect(bad.r!.exit_code).toBe(3);
    expect(bad.r!.error).toContain("1 of 4 rows rejected (25.000 %)");
  });

  it("malformed CSV rows (too many or too few fields) are rejected with their line", async () => {
    const prod = "region,commodity,year,quantity\nA,c1,2000,100\nB,c1,2000,5,extra\nC,c1\nD,c1,2001,7\n";
    const { r, dir } = await run({ "production.csv": prod });
    expect(r!.exit_code).toBe(3);
    const rows = await rejects(dir);
    expect(rows.map((x) => Number(x.line))).toEqual([3, 4]);
    expect(String(rows[0]!.reason)).toContain("TOO MANY COLUMNS");
    expect(String(rows[1]!.reason)).toContain("MISSING COLUMNS");
    expect(rows[0]!.value).toBe("B,c1,2000,5,extra");
  });

  it("a truncated file (last line cut) loses nothing silently", async () => {
    const full = "region,commodity,year,quantity\nA,c1,2000,100\nB,c1,2000,50\nC,c1,2000,25\n";
    const cut = full.slice(0, full.length - 6); // "C,c1,2" remains
    const { r, dir } = await run({ "production.csv": cut });
    expect(r!.exit_code).toBe(3);
    const rows = await rejects(dir);
    expect(rows).toHaveLength(1);
    expect(Number(rows[0]!.line)).toBe(4);
  });

  it("an empty file is a clear error naming the file and the expected columns", async () => {
    const { r, err } = await run({ "production.csv": "" });
    expect(r?.exit_code ?? 3).toBe(3);
    const msg = r?.error ?? err!.message;
    expect(msg).toMatch(/production\.csv: the file is empty \(0 bytes\); expected a header line with the columns region, commodity, year, quantity/);
  });

  it("a missing declared column names the file, the column and what the file has", async () => {
    const { r } = await run({ "production.csv": "region,commodity,yr,quantity\nA,c1,2000,1\n" });
    expect(r!.exit_code).toBe(3);
    expect(r!.error).toMatch(/declared column\(s\) year not found; the file has: region, commodity, yr, quantity/);
  });

  it("a missing file", async () => {
    const dir = tmp();
    write(dir, { "p.yaml": PIPE(), "trade.csv": GOOD_TRADE });
    const res = cli(["run", path.join(dir, "p.yaml"), "--out", path.join(dir, "o")]);
    expect(res.code).toBe(3);
    expect(res.stderr).toMatch(/source production: no file matches production\.csv/);
  });

  it("a corrupt Parquet file is a clear data error", async () => {
    const dir = tmp();
    write(dir, {
      "p.yaml": PIPE().replace("path: production.csv", "path: production.parquet"),
      "trade.csv": GOOD_TRADE,
    });
    writeFileSync(path.join(dir, "production.parquet"), "PAR1 this is not really parquet");
    const res = cli(["run", path.join(dir, "p.yaml"), "--out", path.join(dir, "o")]);
    expect(res.code).toBe(3);
    expect(res.stderr).toMatch(/source production: cannot read .*production\.parquet as parquet/);
  });

  it("unknown flow labels are named with counts and the accepted labels", async () => {
    const { r } = await run({ "trade.csv": GOOD_TRADE + "A,B,c1,re-export,2000,3\n" });
    expect(r!.exit_code).toBe(3);
    expect(r!.error).toContain('unknown flow label(s) "re-export" (1 rows); accepted: "import", "export"');
  });

  it("unknown commodity codes are reported as unmapped with their mass, never dropped", async () => {
    const dir = tmp();
    write(dir, {
      "p.yaml": PIPE("audit: { unmapped_max_share: 0.1 }\n").replace("steps:", `  conc:\n    path: conc.csv\n    columns: { commodity: text, product: text, material: text, factor: number, share: number }\nsteps:`) + "    concordance: conc\n",
      "production.csv": "region,commodity,year,quantity\nA,c1,2000,100\nA,zz,2000,7\n",
      "trade.csv": GOOD_TRADE,
      "conc.csv": "commodity,product,material,factor,share\nc1,cars,steel,1,1\n",
    });
    const r = await runPipeline(loadPipeline(path.join(dir, "p.yaml")), { out: path.join(dir, "o") });
    expect(r.status).toBe("ok");
    const s = await Session.open();
    const un = await s.all(`SELECT * FROM read_parquet('${dir}/o/consumption_unmapped.parquet')`);
    const au = await s.all(`SELECT * FROM read_parquet('${dir}/o/audit.parquet') WHERE "check" = 'unmapped' AND row_kind = 'item'`);
    s.close();
    expect(un).toEqual([{ region: "A", commodity: "zz", year: 2000, production: 7, imports: 0, exports: 0, unit: "t", reason: "commodity not in the concordance" }]);
    expect(au).toHaveLength(1);
    expect(String(au[0]!.message)).toContain("commodity zz");
  });

  it("the CLI exit code of a data error is 3 and nothing appears at --out", () => {
    const dir = tmp();
    write(dir, { "p.yaml": PIPE(), "production.csv": "region,commodity,year,quantity\nA,c1,2000,x\n", "trade.csv": GOOD_TRADE });
    const res = cli(["run", path.join(dir, "p.yaml"), "--out", path.join(dir, "o"), "--quiet"]);
    expect(res.code).toBe(3);
    expect(existsSync(path.join(dir, "o"))).toBe(false);
    expect(existsSync(path.join(dir, "o.failed", "rejects.parquet"))).toBe(true);
    expect(res.stdout).toContain("run FAILED (exit 3)");
    expect(res.stdout).toMatch(/production\.csv:line 2: column quantity, value "x": quantity is not a number/);
  });
});


describe("Parquet sources", () => {
  it("clean files are used as they are; bad rows and duplicate keys are rejected with their row number", async () => {
    const dir = tmp();
    const s = await Session.open();
    await s.run(`COPY (SELECT * FROM (VALUES ('A', 'c1', 2000, 100.0), ('B', 'c1', 2000, -4.0), ('C', 'c1', 2001, 1.0), ('C', 'c1', 2001, 2.0), ('D', 'c1', 2002, 'NaN'::DOUBLE))
      t(region, commodity, year, quantity)) TO '${dir}/production.parquet' (FORMAT parquet)`);
    await s.run(`COPY (SELECT 'A' AS region, 'c1' AS commodity, 2000 AS year, 5.0 AS quantity) TO '${dir}/clean.parquet' (FORMAT parquet)`);
    s.close();
    write(dir, {
      "p.yaml": PIPE().replace("path: production.csv", "path: production.parquet"),
      "q.yaml": PIPE().replace("path: production.csv", "path: clean.parquet"),
      "trade.csv": GOOD_TRADE,
    });
    const bad = await runPipeline(loadPipeline(path.join(dir, "p.yaml")), { out: path.join(dir, "out") });
    expect(bad.exit_code).toBe(3);
    const rows = await rejects(dir);
    expect(rows.map((r) => [Number(r.row), r.column, String(r.reason).split(" (")[0]])).toEqual([
      [2, "quantity", "negative quantity"],
      [3, "region,commodity,year", "duplicate key"],
      [4, "region,commodity,year", "duplicate key"],
      [5, "quantity", "quantity is not finite"],
    ]);
    const ok = await runPipeline(loadPipeline(path.join(dir, "q.yaml")), { out: path.join(dir, "ok") });
    expect(ok.status).toBe("ok");
    expect(ok.sources[0]).toMatchObject({ rows_read: 1, rows_loaded: 1, rows_rejected: 0 });
  });
});
