/**
 * Charts of a run with more series than a chart keeps (40 products, 14 materials, 14 consuming
 * regions): the series beyond the largest are summed into "other (n)" in DuckDB, and only the kept
 * series' rows reach JavaScript. The figures are checked against sums computed here, separately,
 * from the run's Parquet files.
 */
import { beforeAll, describe, expect, it } from "vitest";
import path from "node:path";
import { Session } from "../../src/engine/session.js";
import { lit } from "../../src/engine/sql.js";
import { collectCharts } from "../../src/report/charts.js";
import { RunReader, sumByYear } from "../../src/report/data.js";
import { chartRows } from "../../src/report/lump.js";
import { lumpSeries } from "../../src/report/specs.js";
import { manySeriesRun } from "./helpers.js";

type Row = { series: string; year?: number; age?: number; value: number; phase?: string; variable?: string };
interface Chart {
  title: string;
  rows: Row[];
  /** The factor back to the table's unit (the chart's title says "thousand t", …). */
  f: number;
}

const FACTOR: Record<string, number> = { thousand: 1e3, million: 1e6, billion: 1e9 };
const factorOf = (title: string) => FACTOR[/, (thousand|million|billion) /.exec(title)?.[1] ?? ""] ?? 1;
const close = (a: number, b: number, rel = 1e-12) => Math.abs(a - b) <= rel * Math.max(1, Math.abs(a), Math.abs(b));

let run: string;
let s: Session;
let charts: Chart[];
let r: RunReader;
/** The most rows one query of the report brought into JavaScript. */
let largest = 0;
const pq = (file: string) => `read_parquet(${lit(path.join(run, file))})`;
const chart = (prefix: string) => {
  const c = charts.find((x) => x.title.startsWith(prefix));
  if (!c) throw new Error(`no chart ${prefix}: ${charts.map((x) => x.title).join("; ")}`);
  return c;
};
const otherOf = (c: Chart) => [...new Set(c.rows.map((x) => x.series))].filter((x) => x.startsWith("other ("));
const keptOf = (c: Chart) => [...new Set(c.rows.map((x) => x.series))].filter((x) => !x.startsWith("other ("));
const inList = (xs: string[]) => xs.map(lit).join(", ");

beforeAll(async () => {
  run = manySeriesRun();
  r = await RunReader.open(run);
  const all = r.all.bind(r);
  r.all = async (sql: string) => {
    const got = await all(sql);
    largest = Math.max(largest, got.length);
    return got;
  };
  const specs = (await collectCharts(r)).flatMap((g) => g.items).flatMap((i) => ("spec" in i ? [i.spec] : []));
  charts = specs.map((x) => ({ title: x.title, rows: (x as unknown as { data: { values: Row[] } }).data.values, f: factorOf(x.title) }));
  s = await Session.open({ threads: 2 });
  return () => {
    s.close();
    r.close();
  };
});

describe("charts with more series than they keep", () => {
  it("keep the largest series and one \"other (n)\"; no query brings a whole table into JavaScript", () => {
    const want: [string, number, string][] = [
      ["Apparent consumption by region", 10, "other (5)"],
      ["Stock in use by product", 12, "other (29)"],
      ["Inflow and outflow by product", 12, "other (29)"],
      ["Material stock in use by material", 12, "other (3)"],
      ["Age structure of the stock in 2011", 12, "other (29)"],
      ["Mean age of the stock by product", 10, "other (31)"],
    ];
    for (const [title, n, other] of want) {
      const c = chart(title);
      expect(new Set(c.rows.map((x) => x.series)).size, title).toBe(n);
      expect(otherOf(c), title).toEqual([other]);
    }
    // The flows of every product and year would be 40 × 17 rows; the charts hold at most 12 series × 17 years.
    expect(largest).toBeLessThanOrEqual(12 * 17);
  });

  it("the others' sums and the charts' totals equal the Parquet files' sums (conservation of the total; common practice, no source)", async () => {
    // Stock, inflow and outflow by product: history from hist.parquet, scenario from scen.parquet.
    for (const prefix of ["Stock in use by product", "Inflow and outflow by product"]) {
      const c = chart(prefix);
      const other = otherOf(c)[0]!;
      const kept = keptOf(c);
      let checked = 0;
      for (const [file, phase] of [["hist.parquet", "history"], ["scen.parquet", "scenario"]] as const) {
        for (const v of prefix.startsWith("Stock") ? ["stock"] : ["inflow", "outflow"]) {
          const sums = await s.all(`SELECT CAST(year AS INTEGER) AS year, sum(${v}) FILTER (WHERE product NOT IN (${inList(kept)})) AS other, sum(${v}) AS total
            FROM ${pq(file)} GROUP BY year`);
          expect(sums.length).toBeGreaterThan(4);
          for (const w of sums) {
            const rows = c.rows.filter((x) => x.year === w.year && x.phase === phase && (x.variable ?? "stock") === v);
            expect(close(rows.find((x) => x.series === other)!.value * c.f, Number(w.other)), `${v} ${phase} ${w.year}`).toBe(true);
            expect(close(rows.reduce((a, x) => a + x.value * c.f, 0), Number(w.total), 1e-9), `${v} ${phase} ${w.year} total`).toBe(true);
            checked++;
          }
        }
      }
      expect(checked).toBeGreaterThan(10);
      // The scenario's lines start from the history's values of 2011 (its last year before the scenario).
      for (const x of c.rows.filter((y) => y.phase === "history" && y.year === 2011)) {
        expect(c.rows.find((y) => y.phase === "scenario" && y.year === 2011 && y.series === x.series && y.variable === x.variable)!.value).toBe(x.value);
      }
    }
    // Material stock by material.
    const m = chart("Material stock in use by material");
    for (const [file, phase] of [["hist_materials.parquet", "history"], ["scen_materials.parquet", "scenario"]] as const) {
      for (const w of await s.all(`SELECT CAST(year AS INTEGER) AS year, sum(stock) FILTER (WHERE material NOT IN (${inList(keptOf(m))})) AS other, sum(stock) AS total
          FROM ${pq(file)} GROUP BY year`)) {
        const rows = m.rows.filter((x) => x.year === w.year && x.phase === phase);
        expect(close(rows.find((x) => x.series === "other (3)")!.value * m.f, Number(w.other))).toBe(true);
        expect(close(rows.reduce((a, x) => a + x.value * m.f, 0), Number(w.total), 1e-9)).toBe(true);
      }
    }
    // Apparent consumption by region.
    const c = chart("Apparent consumption by region");
    for (const w of await s.all(`SELECT CAST(year AS INTEGER) AS year, sum(consumption) FILTER (WHERE region NOT IN (${inList(keptOf(c))})) AS other, sum(consumption) AS total
        FROM ${pq("consumption.parquet")} GROUP BY year`)) {
      const rows = c.rows.filter((x) => x.year === w.year);
      expect(close(rows.find((x) => x.series === "other (5)")!.value * c.f, Number(w.other))).toBe(true);
      expect(close(rows.reduce((a, x) => a + x.value * c.f, 0), Number(w.total), 1e-9)).toBe(true);
    }
    // Age structure of 2011 from the by-cohort table: every drawn age's "other" value is the sum over the products not kept.
    const a = chart("Age structure of the stock in 2011");
    const ages = await s.all(`SELECT CAST(year - cohort AS INTEGER) AS age, sum(stock) FILTER (WHERE product NOT IN (${inList(keptOf(a))})) AS other
      FROM ${pq("hist_by_cohort.parquet")} WHERE year = 2011 GROUP BY ALL`);
    const drawn = a.rows.filter((x) => x.series === "other (29)");
    expect(drawn.length).toBeGreaterThan(5);
    for (const x of drawn) expect(close(x.value * a.f, Number(ages.find((w) => w.age === x.age)!.other))).toBe(true);
    // Mean age: "other (n)" is the stock-weighted mean age of the products it holds (a mean is not
    // additive; the weighted mean's definition, common practice, no source).
    const g = chart("Mean age of the stock by product");
    let aged = 0;
    for (const [file, phase] of [["hist.parquet", "history"], ["scen.parquet", "scenario"]] as const) {
      const cols = (await s.all(`DESCRIBE SELECT * FROM ${pq(file)}`)).map((x) => String(x.column_name));
      if (!cols.includes("mean_age_stock")) continue;
      for (const w of await s.all(`SELECT CAST(year AS INTEGER) AS year, sum(mean_age_stock * stock) / sum(stock) AS other FROM ${pq(file)}
          WHERE product NOT IN (${inList(keptOf(g))}) AND mean_age_stock IS NOT NULL GROUP BY year HAVING sum(stock) <> 0`)) {
        const x = g.rows.find((y) => y.year === w.year && y.phase === phase && y.series.startsWith("other ("));
        if (!x) continue;
        expect(close(x.value * g.f, Number(w.other)), `mean age ${phase} ${w.year}`).toBe(true);
        expect(x.value * g.f).toBeLessThan(200); // a mean age, not a sum of them
        aged++;
      }
    }
    expect(aged).toBeGreaterThan(4);
  });

  it("keep the series lumpSeries keeps: the JavaScript fallback over every series' rows gives the same charts", async () => {
    // Apparent consumption by region: every region's sums read here, lumped in JavaScript.
    const c = chart("Apparent consumption by region");
    const byRegion = (await s.all(`SELECT region AS series, CAST(year AS INTEGER) AS year, CAST(sum(consumption) AS DOUBLE) AS value
      FROM ${pq("consumption.parquet")} GROUP BY ALL ORDER BY 1, 2`)).map((x) => ({ series: String(x.series), year: Number(x.year), value: Number(x.value) }));
    const js = lumpSeries(byRegion, 10);
    expect(js.length).toBe(c.rows.length);
    for (const x of js) expect(close(c.rows.find((y) => y.series === x.series && y.year === x.year)!.value * c.f, x.value)).toBe(true);
    // Stock, inflow and outflow by product: both models' rows, the scenario's first point repeated from the history's 2011.
    const flows: Row[] = [];
    for (const [file, phase] of [["hist.parquet", "history"], ["scen.parquet", "scenario"]] as const) {
      for (const x of await s.all(`SELECT product, CAST(year AS INTEGER) AS year, sum(stock) AS stock, sum(inflow) AS inflow, sum(outflow) AS outflow FROM ${pq(file)} GROUP BY ALL`)) {
        for (const v of ["stock", "inflow", "outflow"]) flows.push({ series: String(x.product), year: Number(x.year), value: Number(x[v]), phase, variable: v });
      }
    }
    flows.push(...flows.filter((x) => x.phase === "history" && x.year === 2011).map((x) => ({ ...x, phase: "scenario" })));
    const f = chart("Stock in use by product");
    expect(new Set(lumpSeries(flows, 12).map((x) => x.series))).toEqual(new Set(f.rows.map((x) => x.series)));
    // The age structure: every product's ages read here, lumped in JavaScript.
    const a = chart("Age structure of the stock in 2011");
    const ages = (await s.all(`SELECT product AS series, CAST(year - cohort AS INTEGER) AS age, CAST(sum(stock) AS DOUBLE) AS value
      FROM ${pq("hist_by_cohort.parquet")} WHERE year = 2011 GROUP BY ALL ORDER BY 1, 2`)).map((x) => ({ series: String(x.series), age: Number(x.age), value: Number(x.value) }));
    const lumped = lumpSeries(ages, 12);
    expect(new Set(lumped.map((x) => x.series))).toEqual(new Set(a.rows.map((x) => x.series)));
    for (const x of a.rows) expect(close(x.value * a.f, lumped.find((y) => y.series === x.series && y.age === x.age)!.value)).toBe(true);
  });

  it("sumByYear lumps in DuckDB as lumpSeries does in JavaScript", async () => {
    const got = await sumByYear(r, "stock", "product", (st) => st.id, 12);
    const all = await sumByYear(r, "stock", "product", (st) => st.id, Infinity);
    expect(new Set(all.map((x) => x.series)).size).toBe(40);
    const js = lumpSeries(all, 12);
    expect(got.length).toBe(js.length);
    for (const x of js) expect(close(got.find((y) => y.series === x.series && y.year === x.year && y.phase === x.phase)!.value, x.value)).toBe(true);
    // The whole: every product's stock of a year in hist.parquet (conservation of the total; common practice, no source).
    const total = Number(await s.scalar(`SELECT sum(stock) FROM ${pq("hist.parquet")} WHERE year = 2011`));
    expect(close(got.filter((x) => x.phase === "history" && x.year === 2011).reduce((a, x) => a + x.value, 0), total, 1e-9)).toBe(true);
  });

  it("rank a scenario's first point (drawn again from the history's last year) as lumpSeries ranks the joined rows", async () => {
    // Without that point b is larger (12 > 10); with it a is (18 > 13): the chart keeps a.
    const hist: Row[] = [["a", 1, 1], ["a", 2, 8], ["b", 1, 10], ["b", 2, 1], ["c", 1, 1], ["c", 2, 1]].map(([series, year, value]) => ({ series: String(series), year: Number(year), value: Number(value), phase: "history" }));
    const scen: Row[] = ["a", "b", "c"].map((series) => ({ series, year: 3, value: 1, phase: "scenario" }));
    const values = [...hist, ...scen].map((x) => `(${x.phase === "history" ? 0 : 1}, ${lit(x.phase!)}, ${lit(x.series)}, ${x.year}, ${x.value}::DOUBLE)`).join(", ");
    const data = `SELECT * FROM (VALUES ${values}) AS t(part, phase, series, year, value)`;
    const got = await chartRows(r, data, { values: ["value"], order: ["part", "series", "year"], links: [{ from: "history", to: "scenario" }], max: 2 });
    const joined = [...hist, ...scen, ...hist.filter((x) => x.year === 2).map((x) => ({ ...x, phase: "scenario" }))];
    const js = lumpSeries(joined, 2);
    expect(new Set(got.rows.map((x) => x.series))).toEqual(new Set(["a", "other (2)"]));
    expect(new Set(js.map((x) => x.series))).toEqual(new Set(["a", "other (2)"]));
    expect(got.rows.find((x) => x.series === "other (2)" && x.year === 1)!.value).toBe(11);
    expect(got.lumped).toBe(true);
    expect(got.sortKey("other (2)")).toBe("b");
  });
});
