import { afterAll, beforeAll, describe, expect, it } from "vitest";
import { Session } from "../../src/engine/session.js";
import { Exact } from "../../src/engine/sql.js";
import { asymmetryItems } from "../../src/ops/asymmetry.js";
import { nativeReader, useNativeReader } from "../../src/engine/handoff.js";

// The two ways of finding pairs of reports must give the same items. The reference is the
// grouped way, checked by hand in apparent-consumption.test.ts; here the same items must
// come out of the sorted keys, and the sorted way must step aside where it is not exact.
let s: Session;
beforeAll(async () => {
  s = await Session.open();
});
afterAll(() => s.close());

async function items(table: string, grouped = false) {
  const a = await asymmetryItems(s, { trade: table, prefix: `__t_${table}`, threshold: 0.25, exact: new Exact(1e6) }, grouped);
  const rows = await s.all(`SELECT CAST(keys AS VARCHAR) AS keys, year, observed, expected, tolerance, message FROM (${a.items}) ORDER BY ALL`);
  await a.cleanup();
  return { path: a.path, rows };
}

describe("trade asymmetry: pairs found by sorted numbered keys = pairs found by grouping", () => {
  it("a random bilateral set with most reports paired", async () => {
    // 6 regions, 7 commodities, 5 years; each (importer, exporter, commodity, year) reported by
    // the importer, the exporter, both or neither, with quantities that differ by up to 60 %.
    await s.run(`CREATE TABLE tr AS
      WITH k AS (SELECT 'R' || i AS imp, 'R' || e AS exp, 'C' || c AS commodity, CAST(2000 + y AS BIGINT) AS year, hash(i, e, c, y) % 4 AS who
                 FROM range(6) a(i), range(6) b(e), range(7) d(c), range(5) f(y) WHERE i <> e)
      SELECT imp AS reporter, exp AS partner, commodity, 'import' AS flow, year, 1 + (hash(imp, commodity, year) % 10000) / 7.0 AS quantity, FALSE AS mirrored FROM k WHERE who IN (0, 1)
      UNION ALL
      SELECT exp, imp, commodity, 'export', year, (1 + (hash(imp, commodity, year) % 10000) / 7.0) * (0.7 + (hash(exp, year) % 60) / 100.0), FALSE FROM k WHERE who IN (0, 2)
      UNION ALL SELECT 'R1', 'R2', 'C1', 'export', 2003, 5.0, TRUE`);
    const sorted = await items("tr");
    const grouped = await items("tr", true);
    expect(sorted.path).toBe("sorted keys");
    expect(grouped.path).toBe("grouped text keys");
    expect(sorted.rows.length).toBeGreaterThan(200);
    expect(sorted.rows).toEqual(grouped.rows);
    expect(sorted.rows.some((r) => Math.abs(Number(r.observed) - Number(r.expected)) > Number(r.tolerance))).toBe(true);
  });

  it("two reports of one pair and flow: the sorted way finds them and steps aside", async () => {
    await s.run(`CREATE TABLE dup AS SELECT * FROM (VALUES
      ('A', 'B', 'c1', 'import', 2000::BIGINT, 60.0, FALSE), ('A', 'B', 'c1', 'import', 2000, 40.0, FALSE), ('B', 'A', 'c1', 'export', 2000, 70.0, FALSE),
      ('A', 'C', 'c1', 'import', 2000, 10.0, FALSE), ('C', 'A', 'c1', 'export', 2000, 10.0, FALSE))
      t(reporter, partner, commodity, flow, year, quantity, mirrored)`);
    const r = await items("dup");
    expect(r.path).toBe("grouped text keys");
    // imports of A from B: 60 + 40 = 100 against exports of 70
    expect(r.rows.map((x) => [x.keys, x.observed, x.expected])).toEqual([
      ["{importer=A, exporter=B, commodity=c1}", 100, 70],
      ["{importer=A, exporter=C, commodity=c1}", 10, 10],
    ]);
  });

  it("a NULL key or a non-integer year also goes the general way", async () => {
    await s.run(`CREATE TABLE nul AS SELECT * FROM (VALUES ('A', NULL, 'c1', 'import', 2000::BIGINT, 1.0, FALSE), ('B', 'A', 'c1', 'export', 2000, 1.0, FALSE))
      t(reporter, partner, commodity, flow, year, quantity, mirrored)`);
    expect((await items("nul")).path).toBe("grouped text keys");
    await s.run(`CREATE TABLE dy AS SELECT * FROM (VALUES ('A', 'B', 'c1', 'import', 2000.5::DOUBLE, 1.0, FALSE), ('B', 'A', 'c1', 'export', 2000.5, 1.0, FALSE))
      t(reporter, partner, commodity, flow, year, quantity, mirrored)`);
    const dy = await items("dy");
    expect(dy.path).toBe("grouped text keys");
    expect(dy.rows).toHaveLength(1);
  });

  it("sorted outside DuckDB (native/keysort.c) = sorted by DuckDB = grouped, on 300,000 reports in thousands of partitions", async () => {
    // 40 regions, 50 commodities, 10 years: keys of 21 bits, 4,096 partitions, blocks filled
    // and chained on two threads; about half the pairs reported by both sides.
    await s.run(`CREATE TABLE big AS
      WITH k AS (SELECT 'R' || i AS imp, 'R' || e AS exp, 'C' || c AS commodity, CAST(1990 + y AS BIGINT) AS year, hash(i, e, c, y) % 4 AS who
                 FROM range(40) a(i), range(40) b(e), range(50) d(c), range(10) f(y) WHERE i <> e AND hash(i, c, e, y) % 5 = 0)
      SELECT imp AS reporter, exp AS partner, commodity, 'import' AS flow, year, (hash(imp, commodity, year) % 100000) / 9.0 AS quantity, FALSE AS mirrored FROM k WHERE who IN (0, 1)
      UNION ALL
      SELECT exp, imp, commodity, 'export', year, ((hash(imp, commodity, year) % 100000) / 9.0) * (0.5 + (hash(exp, commodity, year) % 100) / 100.0), FALSE FROM k WHERE who IN (0, 2)`);
    expect(Number(await s.scalar("SELECT count(*) FROM big"))).toBeGreaterThan(100_000);
    expect(nativeReader()).not.toBeNull(); // built by npm ci (scripts/build-native.mjs)
    const native = await items("big");
    useNativeReader(false);
    let bySql;
    try {
      bySql = await items("big");
    } finally {
      useNativeReader(true);
    }
    const grouped = await items("big", true);
    expect(native.path).toBe("sorted keys");
    expect(bySql.path).toBe("sorted keys");
    expect(native.rows.length).toBeGreaterThan(30_000);
    expect(native.rows).toEqual(grouped.rows);
    expect(bySql.rows).toEqual(grouped.rows);
    // the pairs table comes out in key order from the native sort
    const a = await asymmetryItems(s, { trade: "big", prefix: "__t_order", threshold: 0.25, exact: new Exact(1e6) });
    expect(Number(await s.scalar(`SELECT count(*) FROM (SELECT k, lag(k) OVER (ORDER BY rowid) AS p FROM "__t_order_pairs") WHERE p >= k`))).toBe(0);
    await a.cleanup();
  });

  it("beyond the memory budget the native sort takes no more rows and DuckDB sorts them: the same items", async () => {
    process.env.CAIRN_SINK_MAX_BYTES = String(4 << 20); // 300,000 reports need 4.8 MB
    let over;
    try {
      over = await items("big");
    } finally {
      delete process.env.CAIRN_SINK_MAX_BYTES;
    }
    expect(over.path).toBe("sorted keys");
    expect(over.rows).toEqual((await items("big", true)).rows);
  });

  it("a duplicate report among 300,000 sends the native sort to the general way too", async () => {
    await s.run(`CREATE TABLE bigdup AS SELECT * FROM big UNION ALL (SELECT * FROM big WHERE flow = 'export' LIMIT 1)`);
    const r = await items("bigdup");
    expect(r.path).toBe("grouped text keys");
  });
});
