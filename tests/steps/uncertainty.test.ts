/**
 * `uncertainty:` on a cohort model, run through the pipeline.
 *
 * Checks against outside references:
 * - zero spread: every quantile and the mean equal the deterministic run (the model is
 *   deterministic given its inputs), for the product and its materials, with a stock in place
 *   by age and content that changes by cohort (the run-by-run path);
 * - a multiplicative input error, fully correlated, normal with sd s: the stock's mean and sd
 *   equal the closed form (the model is linear in its input: E = S₀, sd = s·S₀), within 4
 *   standard errors (SE(mean) = sd/√D, SE(sd) ≈ sd/√(2(D − 1)), common practice, no source);
 * - variance-based sensitivity with one uncertain assumption: its first-order and total-effect
 *   indices are 1 (law of total variance: V(E[Y|X]) = V(Y) when Y depends on X alone);
 * - totals: the mean of the per-draw totals equals the sum of the series' means (linearity of
 *   expectation), checked by the uncertainty-totals audit and here;
 * - the same seed gives the same bytes; another seed, other numbers.
 */
import { beforeAll, describe, expect, it } from "vitest";
import { readFileSync } from "node:fs";
import path from "node:path";
import { Session } from "../../src/engine/session.js";
import { lit } from "../../src/engine/sql.js";
import { cli, tmp, write } from "../helpers.js";

const YEARS = Array.from({ length: 25 }, (_, i) => 2000 + i);
const SERIES = [["A", "cars"], ["A", "houses"], ["B", "cars"], ["B", "houses"]] as const;

function files(dir: string): void {
  const inflow = ["region,product,year,value"];
  SERIES.forEach(([r, p], s) => YEARS.forEach((y) => inflow.push(`${r},${p},${y},${100 + 10 * s + 3 * (y - 2000) + (y % 3)}`)));
  const init = ["region,product,age,value"];
  SERIES.forEach(([r, p], s) => [0, 1, 2, 5, 9, 15].forEach((a) => init.push(`${r},${p},${a},${50 + s * 7 + a}`)));
  write(dir, {
    "inflow.csv": inflow.join("\n") + "\n",
    "initial.csv": init.join("\n") + "\n",
    "lifetimes.csv": "product,first_cohort,last_cohort,distribution,mean,sd\ncars,,2009,normal,12,4\ncars,2010,,normal,14,4\nhouses,,,lognormal,40,12\n",
    "groups.csv": "member,group\nA,AB\nB,AB\nB,BONLY\n",
    "content.csv": "product,material,first_cohort,last_cohort,content\ncars,steel,,2011,0.7\ncars,steel,2012,,0.6\ncars,alu,,,0.1\nhouses,cement,,,0.8\n",
  });
}

function pipeline(dir: string, uncertainty: string, withInit = true, extra = ""): string {
  const f = path.join(dir, `p-${Math.random().toString(36).slice(2)}.yaml`);
  write(dir, {
    [path.basename(f)]: `name: u
base_unit: t
sources:
  inflow: { path: inflow.csv, unit: t, columns: { region: {type: text, key: true}, product: {type: text, key: true}, year: {type: integer, key: true}, value: quantity } }
  initial: { path: initial.csv, unit: t, columns: { region: {type: text, key: true}, product: {type: text, key: true}, age: {type: integer, key: true}, value: quantity } }
  lifetimes: { path: lifetimes.csv, columns: { product: text, first_cohort: {type: integer, nullable: true}, last_cohort: {type: integer, nullable: true}, distribution: text, mean: number, sd: number } }
  content: { path: content.csv, columns: { product: text, material: text, first_cohort: {type: integer, nullable: true}, last_cohort: {type: integer, nullable: true}, content: number } }
  groups: { path: groups.csv, columns: { member: text, group: text } }
steps:
  - id: m
    kind: cohort-model
    mode: inflow-driven
    input: inflow
    keys: [region, product]
    lifetimes: lifetimes
    content: content
${withInit ? "    initial_stock: initial\n" : ""}    uncertainty:
${uncertainty.split("\n").map((l) => `      ${l}`).join("\n")}
${extra}`,
  });
  return f;
}

let s: Session;
let dir = "";
beforeAll(async () => {
  s = await Session.open({ threads: 2 });
  dir = tmp("cairn-unc-");
  files(dir);
});

function run(file: string, out: string): void {
  const r = cli(["run", file, "--out", out, "--quiet", "--no-report"]);
  expect(r.code, r.stderr).toBe(0);
}

const q = (sql: string) => s.all(sql);

describe("cohort-model uncertainty", () => {
  it("zero spread: quantiles and mean equal the deterministic run, product and materials", async () => {
    const out = path.join(dir, "zero");
    run(pipeline(dir, "draws: 50\nlifetimes: { mean: { family: normal, rel_sd: 0 } }\ncontent: { family: normal, rel_sd: 0 }\ninput: { spread: { family: normal, rel_sd: 0 }, correlation: { kind: ar1, rho: 0.5 } }"), out);
    const u = path.join(out, "m_uncertainty.parquet");
    const rows = await q(`SELECT max(abs(q05 - central) / greatest(1, abs(central))) AS a, max(abs(q95 - central) / greatest(1, abs(central))) AS b,
      max(abs(mean - central) / greatest(1, abs(central))) AS c, max(sd / greatest(1, abs(central))) AS d, count(*) AS n,
      count(*) FILTER (WHERE material IS NOT NULL) AS nm FROM read_parquet(${lit(u)})`);
    expect(Number(rows[0]!.n)).toBeGreaterThan(0);
    expect(Number(rows[0]!.nm)).toBeGreaterThan(0);
    for (const k of ["a", "b", "c", "d"]) expect(Number(rows[0]![k])).toBeLessThan(1e-12);
    // central is the published figure of the main and materials tables.
    const cmp = await q(`SELECT max(abs(u.central - m.stock)) AS e FROM read_parquet(${lit(u)}) u JOIN read_parquet(${lit(path.join(out, "m.parquet"))}) m USING (region, product, year)
      WHERE u.variable = 'stock' AND u.material IS NULL AND u.total_over IS NULL`);
    expect(Number(cmp[0]!.e)).toBe(0);
    const cmpM = await q(`SELECT max(abs(u.central - m.stock)) AS e, count(*) AS n FROM read_parquet(${lit(u)}) u JOIN read_parquet(${lit(path.join(out, "m_materials.parquet"))}) m USING (region, product, material, year)
      WHERE u.variable = 'stock' AND u.total_over IS NULL`);
    expect(Number(cmpM[0]!.n)).toBeGreaterThan(0);
    expect(Number(cmpM[0]!.e)).toBe(0);
  });

  it("a fully correlated input error: stock mean and sd equal the closed form (linear model)", async () => {
    const out = path.join(dir, "input");
    const D = 2000;
    const sdRel = 0.1;
    run(pipeline(dir, `draws: ${D}\nseed: 4\ninput: { spread: { family: normal, rel_sd: ${sdRel} }, correlation: { kind: full } }\nvariables: [stock]`, false), out);
    const rows = await q(`SELECT central, mean, sd FROM read_parquet(${lit(path.join(out, "m_uncertainty.parquet"))}) WHERE variable = 'stock' AND material IS NULL AND total_over IS NULL AND year IN (2005, 2024)`);
    expect(rows.length).toBe(8);
    for (const r of rows) {
      const c = Number(r.central);
      const sd = sdRel * c;
      expect(Math.abs(Number(r.mean) - c)).toBeLessThan(4 * sd / Math.sqrt(D));
      expect(Math.abs(Number(r.sd) - sd)).toBeLessThan(4 * sd / Math.sqrt(2 * (D - 1)));
    }
  });

  it("totals: the mean of per-draw totals is the sum of the series' means; the audit says so", async () => {
    const out = path.join(dir, "totals");
    run(pipeline(dir, "draws: 200\nlifetimes: { mean: { family: normal, rel_sd: 0.2, truncate_below: 0 } }\ntotals: [[], [product]]"), out);
    const rows = await q(`WITH u AS (SELECT * FROM read_parquet(${lit(path.join(out, "m_uncertainty.parquet"))}) WHERE variable = 'stock' AND material IS NULL)
      SELECT t.year, t.mean AS tm, (SELECT sum(mean) FROM u s WHERE s.total_over IS NULL AND s.year = t.year) AS sm, t.sd AS tsd,
        (SELECT sum(sd) FROM u s WHERE s.total_over IS NULL AND s.year = t.year) AS ssd
      FROM u t WHERE t.total_over = 'region,product'`);
    expect(rows.length).toBe(YEARS.length);
    for (const r of rows) {
      expect(Number(r.tm)).toBeCloseTo(Number(r.sm), 4);
      expect(Number(r.tsd)).toBeLessThanOrEqual(Number(r.ssd) * (1 + 1e-12));
    }
    const audit = await q(`SELECT status, items FROM read_parquet(${lit(path.join(out, "audit.parquet"))}) WHERE "check" = 'uncertainty-totals' AND row_kind = 'summary'`);
    expect(audit[0]!.status).toBe("pass");
    expect(Number(audit[0]!.items)).toBeGreaterThan(0);
  });

  it("an aggregate step over groups gets ranges summed draw by draw (a member in two groups counted in each)", async () => {
    const out = path.join(dir, "groups");
    run(pipeline(dir, "draws: 200\nlifetimes: { mean: { family: normal, rel_sd: 0.2, truncate_below: 0 } }", true,
      "  - { id: by_group, kind: aggregate, input: m, groups: groups, by: region, values: [inflow, outflow, stock] }\n"), out);
    const g = await q(`SELECT region, product, year, central, mean FROM read_parquet(${lit(path.join(out, "by_group_uncertainty.parquet"))}) WHERE variable = 'stock' AND material IS NULL AND year = 2020 ORDER BY 1, 2`);
    const series = await q(`SELECT region, product, mean FROM read_parquet(${lit(path.join(out, "m_uncertainty.parquet"))}) WHERE total_over IS NULL AND variable = 'stock' AND material IS NULL AND year = 2020`);
    const agg = await q(`SELECT region, product, stock FROM read_parquet(${lit(path.join(out, "by_group.parquet"))}) WHERE year = 2020`);
    expect(g.map((r) => `${r.region}/${r.product}`)).toEqual(["AB/cars", "AB/houses", "BONLY/cars", "BONLY/houses"]);
    for (const r of g) {
      const members = r.region === "AB" ? ["A", "B"] : ["B"];
      // Linearity of expectation: the mean of the per-draw group sums is the sum of the members' means.
      const sm = series.filter((x) => members.includes(String(x.region)) && x.product === r.product).reduce((a, x) => a + Number(x.mean), 0);
      expect(Number(r.mean)).toBeCloseTo(sm, 4);
      expect(Number(r.central)).toBeCloseTo(Number(agg.find((x) => x.region === r.region && x.product === r.product)!.stock), 4);
    }
    const audit = await q(`SELECT "check", status FROM read_parquet(${lit(path.join(out, "audit.parquet"))}) WHERE "check" IN ('uncertainty-central', 'uncertainty-totals') AND row_kind = 'summary' ORDER BY 1`);
    expect(audit.map((a) => `${a.check}:${a.status}`)).toEqual(["uncertainty-central:pass", "uncertainty-totals:pass"]);
  });

  it("sensitivity: one uncertain assumption explains all of the variance (S = ST = 1)", async () => {
    // Cars (lifetimes of 12 to 14 years: much of each cohort leaves within the window, the stock
    // responds smoothly to the mean). Houses (40 years) respond only through the few short draws:
    // a skewed output, for which the first-order estimator needs a far larger N.
    const out = path.join(dir, "sobol");
    run(pipeline(dir, "draws: 20\nlifetimes: { mean: { family: normal, rel_sd: 0.2, truncate_below: 0 } }\nsensitivity: { base: 256, resamples: 100 }", false), out);
    const rows = await q(`SELECT assumption, first_order, total_effect, first_order_low, first_order_high, total_effect_low, total_effect_high, base_samples FROM read_parquet(${lit(path.join(out, "m_sensitivity.parquet"))})
      WHERE variable = 'stock' AND total_over IS NULL AND product = 'cars' AND year >= 2010`);
    expect(rows.length).toBeGreaterThan(0);
    for (const r of rows) {
      expect(r.assumption).toBe("lifetimes");
      expect(Number(r.base_samples)).toBe(256);
      // Within twice the width of the estimator's own 95 % bootstrap interval.
      expect(Math.abs(Number(r.first_order) - 1)).toBeLessThan(2 * (Number(r.first_order_high) - Number(r.first_order_low)));
      expect(Math.abs(Number(r.total_effect) - 1)).toBeLessThan(2 * (Number(r.total_effect_high) - Number(r.total_effect_low)));
      expect(Number(r.first_order_high) - Number(r.first_order_low)).toBeLessThan(0.6);
    }
  });

  it("the same seed gives the same bytes; another seed other numbers", () => {
    const spec = (seed: number) => `draws: 100\nseed: ${seed}\nsampling: lhs\nlifetimes: { mean: { family: normal, rel_sd: 0.1, truncate_below: 0 } }\ncontent: { family: uniform, rel_half_width: 0.1 }\ninput: { spread: { family: lognormal, rel_sd: 0.05 }, correlation: { kind: independent } }`;
    const f1 = pipeline(dir, spec(1));
    run(f1, path.join(dir, "r1"));
    run(f1, path.join(dir, "r2"));
    run(pipeline(dir, spec(2)), path.join(dir, "r3"));
    const b = (d: string) => readFileSync(path.join(dir, d, "m_uncertainty.parquet"));
    expect(b("r1").equals(b("r2"))).toBe(true);
    expect(b("r1").equals(b("r3"))).toBe(false);
  });

  it("a spread that reaches impossible parameters stops with the draw, the value and what to change", () => {
    const r = cli(["run", pipeline(dir, "draws: 200\nlifetimes: { sd: { family: normal, rel_sd: 3 } }"), "--out", path.join(dir, "bad"), "--quiet", "--no-report"]);
    expect(r.code).toBe(3);
    expect(r.stderr).toMatch(/step m: uncertainty draw \d+: sd = -[\d.e-]+: .*truncate_below/);
  });

  it("a content spread without a content table is refused by check and by run (exit 2)", () => {
    const f = pipeline(dir, "content: { family: normal, rel_sd: 0.1 }").replace(/$/, "");
    const text = readFileSync(f, "utf8").replace("    content: content\n", "");
    write(dir, { "nocontent.yaml": text });
    for (const cmd of ["check", "run"]) {
      const r = cli([cmd, path.join(dir, "nocontent.yaml"), ...(cmd === "run" ? ["--out", path.join(dir, "nc"), "--quiet"] : [])]);
      expect(r.code, r.stderr).toBe(2);
      expect(r.stderr).toMatch(/content spread needs the step's content table/);
    }
  });
});
