/**
 * The splice law (DOMAIN.md, "Continuing a model"): a model over [t0, T] equals the same model
 * over [t0, t1] continued over [t1 + 1, T] from the first run's end state, every cohort with its
 * own remaining amount, lifetime and material content. It follows from linearity; checked here
 * to 1e-12 relative for inflow- and stock-driven models, every lifetime family, lifetimes and
 * content that change by cohort, and a stock in place by age or in steady state.
 */
import { describe, expect, it } from "vitest";
import path from "node:path";
import { loadPipeline } from "../../src/spec/load.js";
import { runPipeline } from "../../src/run/runner.js";
import { Session } from "../../src/engine/session.js";
import { tmp, write } from "../helpers.js";

const YEARS = Array.from({ length: 41 }, (_, i) => 2000 + i); // 2000–2040, split after 2020
const SERIES = ["A|cars", "A|houses", "A|tools", "B|cars", "B|houses", "B|tools", "C|bins"];

// Every family, with lifetimes that change by cohort (rows split at 2010, 2013 and 2015).
const LIFETIMES = `region,product,first_cohort,last_cohort,distribution,mean,sd,shape,scale,curve
,cars,,2009,weibull,,,2.5,12,
,cars,2010,,normal,14,4,,,
,houses,,,lognormal,50,15,,,
B,houses,,2014,gamma,40,10,,,
B,houses,2015,,loglogistic,,,4,35,
,tools,,2012,exponential,6,,,,
,tools,2013,,truncated-normal,8,5,,,
B,tools,,,fixed,7,,,,
,bins,,,table,,,,,c1
`;
const CURVES = "curve,age,survival\nc1,0,0.95\nc1,1,0.8\nc1,2,0.6\nc1,3,0.3\nc1,4,0.1\n";
const CONTENT = `region,product,material,first_cohort,last_cohort,content
,cars,steel,,2011,0.7
,cars,steel,2012,,0.6
,cars,alu,,,0.1
,houses,steel,,1995,0.2
,houses,steel,1996,,0.15
,houses,cement,,,0.8
,tools,steel,,,0.9
,bins,plastics,,,1
`;

const lifetimeCols = `{ region: {type: text, nullable: true}, product: {type: text, nullable: true}, first_cohort: {type: integer, nullable: true}, last_cohort: {type: integer, nullable: true}, distribution: text, mean: {type: number, nullable: true}, sd: {type: number, nullable: true}, shape: {type: number, nullable: true}, scale: {type: number, nullable: true}, curve: {type: text, nullable: true} }`;
const seriesCols = (extra: string) => `{ region: {type: text, key: true}, product: {type: text, key: true}, ${extra} }`;

function sources(files: string[], initialByAge: boolean | null): string {
  const tables = files.map((f) => `  ${f.replace(".csv", "")}: { path: ${f}, unit: t, columns: ${seriesCols("year: {type: integer, key: true}, value: quantity")} }`).join("\n");
  const init = initialByAge === null ? "" : `  initial: { path: initial.csv, unit: t, columns: ${seriesCols(initialByAge ? "age: {type: integer, key: true}, value: quantity" : "value: quantity")} }\n`;
  return `sources:
${tables}
  lifetimes: { path: lifetimes.csv, columns: ${lifetimeCols} }
  curves: { path: curves.csv, columns: { curve: text, age: integer, survival: number } }
  content: { path: content.csv, columns: { region: {type: text, nullable: true}, product: {type: text, nullable: true}, material: text, first_cohort: {type: integer, nullable: true}, last_cohort: {type: integer, nullable: true}, content: number } }
${init}`;
}

function valueCsv(years: number[], f: (s: number, y: number) => number): string {
  const lines = ["region,product,year,value"];
  SERIES.forEach((id, s) => years.forEach((y) => lines.push(`${id.replace("|", ",")},${y},${f(s, y)}`)));
  return lines.join("\n") + "\n";
}

async function splice(mode: "inflow-driven" | "stock-driven", value: (s: number, y: number) => number, initialByAge: boolean | null, poolMinCells?: number) {
  const settings = poolMinCells === undefined ? undefined : { poolMinCells };
  const dir = tmp();
  const first = YEARS.filter((y) => y <= 2020);
  const second = YEARS.filter((y) => y > 2020);
  const init = initialByAge === null ? "" : initialByAge
    ? ["region,product,age,value", ...SERIES.flatMap((id, s) => [0, 1, 2, 5, 9, 20].map((a) => `${id.replace("|", ",")},${a},${10 + s + a}`))].join("\n") + "\n"
    : ["region,product,value", ...SERIES.map((id, s) => `${id.replace("|", ",")},${500 + 40 * s}`)].join("\n") + "\n";
  const step = (id: string, input: string, extra: string) =>
    `  - { id: ${id}, kind: cohort-model, mode: ${mode}, input: ${input}, keys: [region, product], lifetimes: lifetimes, curves: curves, content: content, by_cohort: true${extra} }\n`;
  const initOpt = initialByAge === null ? "" : ", initial_stock: initial";
  write(dir, {
    "full.yaml": `name: full\n${sources(["all.csv"], initialByAge)}steps:\n${step("m", "all", initOpt)}`,
    "split.yaml": `name: split\n${sources(["part1.csv", "part2.csv"], initialByAge)}steps:\n${step("m1", "part1", initOpt)}${step("m2", "part2", ", continues: { step: m1, year: 2020 }")}`,
    "all.csv": valueCsv(YEARS, value), "part1.csv": valueCsv(first, value), "part2.csv": valueCsv(second, value),
    "lifetimes.csv": LIFETIMES, "curves.csv": CURVES, "content.csv": CONTENT, ...(init ? { "initial.csv": init } : {}),
  });
  const full = await runPipeline(loadPipeline(path.join(dir, "full.yaml")), { out: path.join(dir, "full"), settings });
  const split = await runPipeline(loadPipeline(path.join(dir, "split.yaml")), { out: path.join(dir, "split"), settings });
  expect(full.status, full.error).toBe("ok");
  expect(split.status, split.error).toBe("ok");
  const s = await Session.open();
  const worst = async (a: string, b: string, keys: string, cols: string[]) => {
    const out: Record<string, number> = {};
    for (const c of cols) {
      // Relative to the series' own scale (its largest stock or outflow), so that values near zero are compared sensibly.
      const r = await s.one(`WITH j AS (SELECT f.${c} AS x, p.${c} AS y, greatest(max(abs(f.stock)) OVER w, max(abs(f.outflow)) OVER w) AS scale
          FROM '${a}' f JOIN '${b}' p USING (${keys}) WINDOW w AS (PARTITION BY f.region, f.product))
        SELECT max(abs(x - y) / greatest(scale, 1e-300)) AS rel, count(*) AS n FROM j`);
      out[c] = Number(r.rel);
      expect(Number(r.n)).toBeGreaterThan(0);
    }
    return out;
  };
  const main = await worst(`${dir}/full/m.parquet`, `${dir}/split/m2.parquet`, "region, product, year", ["inflow", "outflow", "stock", "stock_change"]);
  const mats = await worst(`${dir}/full/m_materials.parquet`, `${dir}/split/m2_materials.parquet`, "region, product, material, year", ["inflow", "outflow", "stock", "stock_change"]);
  const bc = await worst(`${dir}/full/m_by_cohort.parquet`, `${dir}/split/m2_by_cohort.parquet`, "region, product, cohort, year", ["outflow", "stock"]);
  const rowsFull = Number(await s.scalar(`SELECT count(*) FROM '${dir}/full/m.parquet' WHERE year > 2020`));
  const rowsSplit = Number(await s.scalar(`SELECT count(*) FROM '${dir}/split/m2.parquet'`));
  s.close();
  expect(rowsSplit).toBe(rowsFull);
  return { main, mats, bc };
}

const inflow = (s: number, y: number) => 100 + 10 * s + 3 * (y - 2000) + ((s * 7 + y * 13) % 11);
const stockPath = (s: number, y: number) => 800 + 60 * s + 12 * (y - 2000) + 5 * Math.sin(y + s);

describe("the splice law: a continued model equals the model run in one piece", () => {
  for (const [label, init] of [["no stock in place", null], ["a stock in place by age", true], ["a steady-state stock in place", false]] as const) {
    it(`inflow-driven, ${label}: 1e-12 relative`, async () => {
      const r = await splice("inflow-driven", inflow, init);
      for (const [name, part] of Object.entries(r)) for (const [c, v] of Object.entries(part)) expect(v, `${name} ${c}`).toBeLessThan(1e-12);
    }, 60_000);
  }
  it("inflow-driven on the worker pool (the kernels in WebAssembly on worker threads), a stock in place by age", async () => {
    const r = await splice("inflow-driven", inflow, true, 0);
    for (const [name, part] of Object.entries(r)) for (const [c, v] of Object.entries(part)) expect(v, `${name} ${c}`).toBeLessThan(1e-12);
  }, 60_000);
  for (const [label, init] of [["a stock in place by age", true], ["a steady-state stock in place", false]] as const) {
    it(`stock-driven, ${label}: 1e-12 relative`, async () => {
      const r = await splice("stock-driven", stockPath, init);
      for (const [name, part] of Object.entries(r)) for (const [c, v] of Object.entries(part)) expect(v, `${name} ${c}`).toBeLessThan(1e-12);
    }, 60_000);
  }
});
