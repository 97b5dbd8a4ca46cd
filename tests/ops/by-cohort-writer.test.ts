import { afterAll, beforeAll, describe, expect, it } from "vitest";
import { createHash } from "node:crypto";
import { mkdtempSync, readFileSync, rmSync } from "node:fs";
import { tmpdir } from "node:os";
import path from "node:path";
import { Session } from "../../src/engine/session.js";
import { useNativeReader } from "../../src/engine/handoff.js";
import { ByCohortWriter } from "../../src/ops/by-cohort-writer.js";

// The streamed cohort-resolved writer in small parts (so that several are in DuckDB's hands at
// once and sets of columns are reused): whatever order the series come in, the parts read back
// in file order hold every row once, in (series, cohort, year) order, with the right keys and
// values, and the manifest's sizes and SHA-256 are the files'. The reference is the rows built
// here and node:crypto's hash of the files as written.
const T = 7;
const N = 23;
const rowsOf = (sid: number) => {
  const cohort: number[] = [], year: number[] = [], inflow: number[] = [], outflow: number[] = [], stock: number[] = [];
  for (let c = 0; c < T; c++) {
    for (let t = c; t < T; t++) {
      cohort.push(c);
      year.push(t);
      inflow.push(t === c ? 100 + sid + c / 8 : 0);
      outflow.push(sid + c / 16 + t / 1024);
      stock.push(1000 * sid + 10 * c + t + 0.5);
    }
  }
  return { cohort: Int32Array.from(cohort), year: Int32Array.from(year), inflow: Float64Array.from(inflow), outflow: Float64Array.from(outflow), stock: Float64Array.from(stock) };
};
const perSeries = (T * (T + 1)) / 2;

let s: Session;
let dir: string;
beforeAll(async () => {
  s = await Session.open();
  dir = mkdtempSync(path.join(tmpdir(), "cairn-bcw-"));
  // Series keys: a text region and an integer code (two key columns of two types).
  await s.run(`CREATE TABLE sids AS SELECT CAST(i AS INTEGER) AS sid, 'R' || lpad(CAST(i AS VARCHAR), 2, '0') AS region, CAST(100 + i AS INTEGER) AS code FROM range(${N}) t(i)`);
});
afterAll(() => {
  s.close();
  rmSync(dir, { recursive: true, force: true });
});

async function write(name: string, order: number[], rowsPerPart: number, reverseCohorts = false) {
  const runDir = path.join(dir, name);
  const w = new ByCohortWriter(s, `${name}_by_cohort`, path.join(runDir, `.${name}.parts`), runDir, "m.region, m.code", "sids", 1990, "t", T, N, rowsPerPart);
  for (const sid of order) {
    const r = rowsOf(sid);
    if (!reverseCohorts) await w.add(sid, r.cohort, r.year, r.inflow, r.outflow, r.stock);
    else {
      // The cohorts of a series in descending order, in two calls (runs out of order within a part).
      const at = r.cohort.indexOf(4);
      const part = (a: number, b: number) => [r.cohort.subarray(a, b), r.year.subarray(a, b), r.inflow.subarray(a, b), r.outflow.subarray(a, b), r.stock.subarray(a, b)] as const;
      await w.add(sid, ...part(at, r.cohort.length));
      await w.add(sid, ...part(0, at));
    }
  }
  const files = await w.finish();
  return { runDir, files, w };
}

async function check(name: string, order: number[], rowsPerPart: number, reverseCohorts = false): Promise<void> {
  const { runDir, files, w } = await write(name, order, rowsPerPart, reverseCohorts);
  if (rowsPerPart >= N * perSeries) expect(files.map((f) => f.file)).toEqual([`${name}_by_cohort.parquet`]);
  else expect(files.length).toBeGreaterThanOrEqual(Math.ceil((N * perSeries) / rowsPerPart));
  for (const f of files) {
    const bytes = readFileSync(path.join(runDir, f.file));
    expect(f.bytes).toBe(bytes.length);
    expect(f.sha256).toBe(createHash("sha256").update(bytes).digest("hex"));
  }
  const list = `[${files.map((f) => `'${path.join(runDir, f.file)}'`).join(", ")}]`;
  // Within each part, rows are in (series, cohort, year) order (parts follow the series' arrival).
  const [disorder] = await s.all(`SELECT count(*) AS n FROM (SELECT filename, region, cohort, year,
      lag(region) OVER w AS pr, lag(cohort) OVER w AS pc, lag(year) OVER w AS py FROM read_parquet(${list}, filename = true, file_row_number = true)
      WINDOW w AS (PARTITION BY filename ORDER BY file_row_number)) WHERE pr IS NOT NULL AND (region, cohort, year) <= (pr, pc, py)`);
  expect(Number(disorder!.n)).toBe(0);
  const got = await s.all(`SELECT region, code, cohort, year, inflow, outflow, stock, unit FROM read_parquet(${list}) ORDER BY region, cohort, year`);
  expect(got.length).toBe(N * perSeries);
  let k = 0;
  for (let sid = 0; sid < N; sid++) {
    const r = rowsOf(sid);
    for (let i = 0; i < perSeries; i++, k++) {
      const g = got[k]!;
      expect([g.region, Number(g.code), Number(g.cohort), Number(g.year)]).toEqual([`R${String(sid).padStart(2, "0")}`, 100 + sid, 1990 + r.cohort[i]!, 1990 + r.year[i]!]);
      expect([g.inflow, g.outflow, g.stock, g.unit]).toEqual([r.inflow[i], r.outflow[i], r.stock[i], "t"]);
    }
  }
  // The per series-year sums kept for the audit: Σ over cohorts of the stock.
  for (let sid = 0; sid < N; sid += 5) {
    const r = rowsOf(sid);
    for (let t = 0; t < T; t++) {
      let sum = 0;
      for (let i = 0; i < perSeries; i++) if (r.year[i] === t) sum += r.stock[i]!;
      expect(w.sumStock[sid * T + t]).toBeCloseTo(sum, 9);
    }
  }
}

describe("cohort-resolved writer in parts", () => {
  for (const native of [true, false]) {
    const tag = native ? "native hand-off" : "bindings' calls";
    it(`series in order, parts smaller than a series and larger (${tag})`, async () => {
      useNativeReader(native);
      try {
        const order = Array.from({ length: N }, (_, i) => i);
        await check(`inorder_small_${native}`, order, 10); // a series (28 rows) spans parts
        await check(`inorder_large_${native}`, order, 100); // several series per part, parts in flight at once
        await check(`single_${native}`, order, 10_000); // one part: <table>.parquet
      } finally {
        useNativeReader(true);
      }
    });
    it(`series and cohorts out of order are put in order (${tag})`, async () => {
      useNativeReader(native);
      try {
        const shuffled = Array.from({ length: N }, (_, i) => (i * 7) % N);
        await check(`shuffled_${native}`, shuffled, 90, true);
      } finally {
        useNativeReader(true);
      }
    });
  }
});
