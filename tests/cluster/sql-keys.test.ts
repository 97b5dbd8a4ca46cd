/**
 * The per-key analysis of `sql` steps (src/plan/sql-keys.ts). Its contract: a query placed in
 * the shards commutes with cutting its inputs by the key, Q(cut(inputs)) = cut(Q(inputs)), so the
 * shards' results concatenated are the single run's. Every query the analysis accepts is run by
 * DuckDB (the reference here) on whole tables and on each shard's cut tables, and the row
 * multisets compared; for queries it refuses, the data show the law failing, so the refusals are
 * needed, not just cautious.
 */
import { afterAll, beforeAll, describe, expect, it } from "vitest";
import { Session } from "../../src/engine/session.js";
import { SqlSandbox } from "../../src/plan/sandbox.js";
import { KeyAnalysis, NotPerKey, type Rel } from "../../src/plan/sql-keys.js";

const REGIONS = ["A", "B", "C", "D", "E"];
const SHARDS = [["A", "B"], ["C", "D"], ["E"]];

let s: Session;
let sandbox: SqlSandbox;
let analysis: KeyAnalysis;

beforeAll(async () => {
  s = await Session.open({ threads: 1 });
  sandbox = await SqlSandbox.open();
  analysis = new KeyAnalysis(await sandbox.aggregateNames());
  // c: a partitioned table (region, product, year, x); d: another (region, year, y); w: read whole (product, f).
  await s.run(`CREATE TABLE c AS SELECT r.region, 'p' || (i % 3) AS product, 2000 + (i % 4) AS year, (i * 37 % 101) + length(r.region) AS x
    FROM (SELECT unnest(${JSON.stringify(REGIONS).replace(/"/g, "'")}) AS region) r, range(12) t(i)`);
  await s.run(`DELETE FROM c WHERE region = 'E' AND product = 'p2'`);
  await s.run(`CREATE TABLE d AS SELECT region, 2000 + i AS year, 10 * i + ascii(region) AS y FROM (SELECT unnest(['A', 'B', 'C', 'D', 'E']) AS region), range(4) t(i)`);
  await s.run(`CREATE TABLE w AS SELECT 'p' || i AS product, 1.5 + i AS f FROM range(4) t(i)`);
});
afterAll(() => {
  s.close();
  sandbox.close();
});

const env = (): Map<string, Rel> => new Map([
  ["c", { columns: ["region", "product", "year", "x"], key: [true, false, false, false], partitioned: true }],
  ["d", { columns: ["region", "year", "y"], key: [true, false, false], partitioned: true }],
  ["w", { columns: ["product", "f"], key: [false, false], partitioned: false }],
]);

async function perKey(sql: string): Promise<{ ok: boolean; why?: string }> {
  try {
    const rel = analysis.query((await sandbox.parseTree(sql)).node as Record<string, unknown>, env());
    const i = rel.columns.indexOf("region");
    return rel.partitioned && i >= 0 && rel.key[i] ? { ok: true } : { ok: false, why: "no key column region in the result" };
  } catch (e) {
    if (e instanceof NotPerKey) return { ok: false, why: e.message };
    throw e;
  }
}

/** Rows of the query over whole tables that differ (as multisets) from the shards' results concatenated. */
async function lawBreaks(sql: string): Promise<number> {
  const cut = (shard: string[]) => `WITH c AS (SELECT * FROM main.c WHERE region IN (${shard.map((r) => `'${r}'`).join(", ")})),
    d AS (SELECT * FROM main.d WHERE region IN (${shard.map((r) => `'${r}'`).join(", ")})) SELECT * FROM (${sql})`;
  const shards = SHARDS.map((sh) => `(${cut(sh)})`).join(" UNION ALL ");
  const r = await s.one(`SELECT (SELECT count(*) FROM ((${sql}) EXCEPT ALL (${shards}))) + (SELECT count(*) FROM ((${shards}) EXCEPT ALL (${sql}))) AS n`);
  return Number(r.n);
}

const ACCEPTED = [
  "SELECT region, product, year, sum(x) AS value FROM c GROUP BY region, product, year",
  "SELECT region, year, sum(x) AS value FROM c GROUP BY ALL",
  "SELECT region, product, sum(x) AS value FROM c GROUP BY 1, 2",
  "SELECT c.region, c.year, c.x / d.y AS per FROM c JOIN d USING (region, year)",
  "SELECT c.region, c.x, d.y FROM c JOIN d ON c.region = d.region AND c.year = d.year WHERE c.x > 20",
  "SELECT region, product, x * f AS v FROM c JOIN w USING (product)",
  "SELECT c.region, w.f FROM c LEFT JOIN w ON c.product = w.product",
  "SELECT region, x FROM c UNION ALL SELECT region, y FROM d",
  "SELECT region, year, x, sum(x) OVER (PARTITION BY region ORDER BY year, product) AS running FROM c",
  "SELECT DISTINCT region, product FROM c",
  "SELECT region, product, sum(x) AS v FROM c GROUP BY GROUPING SETS ((region, product), (region))",
  "WITH level AS (SELECT c.region, c.product, c.year, c.x / d.y AS pc FROM c JOIN d USING (region, year) WHERE c.year >= 2001) " +
    "SELECT region, product, year, pc FROM level UNION ALL SELECT l.region, l.product, 2050 AS year, l.pc * 2 FROM level l WHERE l.year = 2003",
  "SELECT * FROM (SELECT region, max(x) AS m FROM c GROUP BY region) t WHERE m > 10",
  "SELECT region FROM c EXCEPT SELECT region FROM d WHERE y > 100",
  "SELECT region, product FROM c SEMI JOIN w USING (product)",
  "SELECT region, product, x FROM c ORDER BY x DESC",
];

const REFUSED = [
  ["SELECT region, sum(x) OVER () AS total FROM c", "window function"],
  ["SELECT region, x, row_number() OVER (ORDER BY x) AS rank FROM c", "window function"],
  ["SELECT 'all' AS region, sum(x) AS v FROM c", "no GROUP BY"],
  ["SELECT product AS region, sum(x) AS v FROM c GROUP BY product", "without a key column"],
  ["SELECT region, product, sum(x) AS v FROM c GROUP BY ROLLUP (region, product)", "grouping set"],
  ["SELECT region, x FROM c ORDER BY x LIMIT 3", "LIMIT"],
  ["SELECT region, x FROM c WHERE x > (SELECT avg(x) FROM c)", "subquery"],
  ["SELECT upper(region) AS region, x FROM c", "column region"],
  ["SELECT w.product AS region, c.x FROM w LEFT JOIN c USING (product)", "keeps the rows"],
  ["SELECT c.region, d.y FROM c JOIN d ON c.year = d.year", "without equal key"],
  ["SELECT region, product FROM c UNION ALL SELECT product AS region, product FROM w", "read whole"],
  ["SELECT DISTINCT year FROM c", "DISTINCT without a key column"],
] as const;

describe("sql steps: per key by their form", () => {
  for (const q of ACCEPTED) {
    it(`accepted and commutes with the cut: ${q.slice(0, 90)}`, async () => {
      const r = await perKey(q);
      expect(r, r.why).toEqual({ ok: true });
      expect(await lawBreaks(q)).toBe(0);
    });
  }
  for (const [q, why] of REFUSED) {
    it(`refused (${why}): ${q.slice(0, 80)}`, async () => {
      const r = await perKey(q);
      expect(r.ok).toBe(false);
      expect(r.why).toContain(why);
    });
  }
  it("the refusals are needed: on these data the shards' results differ from the whole query's", async () => {
    for (const [q] of REFUSED) {
      if (q.includes("upper(") || q.includes("ROLLUP")) continue; // per key by accident on these data, refused by form
      expect(await lawBreaks(q), q).toBeGreaterThan(0);
    }
  });
});
