import { beforeAll, describe, expect, it } from "vitest";
import { spawnSync } from "node:child_process";
import { createHash } from "node:crypto";
import { existsSync, readFileSync, statSync } from "node:fs";
import path from "node:path";
import { Session } from "../../src/engine/session.js";
import { lit } from "../../src/engine/sql.js";
import { collectCharts } from "../../src/report/charts.js";
import { RunReader } from "../../src/report/data.js";
import { renderReport } from "../../src/report/report.js";
import { ROOT, tmp } from "../helpers.js";
import { charts, demoRun, tableRows, twoReleases } from "./helpers.js";

const REPORT_CLI = path.join(ROOT, "dist", "cli", "main.js");
const SVG_NAMESPACES = new Set(["http://www.w3.org/2000/svg", "http://www.w3.org/1999/xlink"]);
const FACTOR: Record<string, number> = { thousand: 1e3, million: 1e6, billion: 1e9 };
/** The scale of a chart's values, from its title ("…, million t)"). */
const factorOf = (title: string) => FACTOR[/, (thousand|million|billion) /.exec(title)?.[1] ?? ""] ?? 1;
const close = (a: number, b: number, rel = 1e-12) => Math.abs(a - b) <= rel * Math.max(1, Math.abs(a), Math.abs(b));

let run: string;
let html: string;
let progress: string[];
let s: Session;
const pq = (file: string) => `read_parquet(${lit(path.join(run, file))})`;

beforeAll(async () => {
  run = demoRun();
  progress = [];
  html = await renderReport(run, { progress: (m) => progress.push(m) });
  s = await Session.open({ threads: 2 });
  return () => s.close();
});

describe("renderReport on the demo run", () => {
  it("is one HTML document with every section, no script and no outside URL", () => {
    expect(html.startsWith("<!doctype html>")).toBe(true);
    expect(html).toContain('<meta charset="utf-8">');
    for (const id of ["inputs", "audit", "charts", "outputs", "revisions", "method"]) expect(html).toContain(`<section id="${id}">`);
    expect(html).toMatch(/<h1>demo<\/h1>/);
    expect(html).toContain("DuckDB v");
    expect(html).toContain("cairn 0.");
    expect(html).toContain("These figures are estimates.");
    expect(html).toContain("no previous release");
    expect(html).not.toMatch(/<script/i);
    expect(html).not.toMatch(/<(link|img|iframe|object|embed)\b/i);
    expect(html).not.toMatch(/@import|url\((?!#)/i);
    const urls = [...html.matchAll(/https?:\/\/[^\s"'<>)]+/g)].map((m) => m[0]);
    expect(urls.filter((u) => !SVG_NAMESPACES.has(u))).toEqual([]);
  });

  it("draws every chart as inline SVG with marks, a title and a text alternative", () => {
    const figs = charts(html);
    const titles = figs.map((f) => /<title>([^<]*)<\/title>/.exec(f)?.[1] ?? "");
    expect(titles.map((t) => t.replace(/ \(.*$/, ""))).toEqual([
      "Apparent consumption by region", "Apparent consumption by material", "Stock in use by product", "Inflow and outflow by product",
      "Material stock in use by material", "Age structure of the stock in 2023 by product", "Mean age of the stock by product",
    ]);
    expect(progress.filter((p) => p.startsWith("chart ")).length).toBe(figs.length);
    for (const f of figs) {
      expect(f.startsWith("<svg")).toBe(true);
      expect(f).toMatch(/^<svg[^>]* role="img" aria-label="[^"]{40,}"/);
      // Marks: line, area and rule marks are drawn as paths with data (d="M…").
      expect((f.match(/<path[^>]* d="M/g) ?? []).length).toBeGreaterThan(3);
      expect(f.length).toBeLessThan(200_000);
      // Year axes (those titled "year"): every label a plain four-digit year, no thousands separator.
      const yearAxes = f.split('class="mark-group role-axis"').slice(1).filter((a) => a.includes(">year</text>"));
      if (!f.includes("<title>Age structure")) expect(yearAxes.length).toBeGreaterThan(0);
      for (const axis of yearAxes) {
        const labels = [...(/class="mark-text role-axis-label"[^>]*>([\s\S]*?)<\/g>/.exec(axis)?.[1] ?? "").matchAll(/>([^<]*)<\/text>/g)].map((m) => m[1]);
        expect(labels.length).toBeGreaterThan(2);
        for (const l of labels) expect(l).toMatch(/^(19|20)\d\d$/);
      }
    }
    expect(figs[0]).toMatch(/>1990</);
    // The note where the by-cohort table is missing (the scenario publishes none).
    expect(html).toContain("Age structure not available for scenario");
  });

  it("reports the audit checks and failing items as audit.parquet holds them", async () => {
    const want = await s.all(`SELECT step, "check", items, failed, worst_residual FROM ${pq("audit.parquet")} WHERE row_kind = 'summary'`);
    const got = tableRows(html, "checks");
    expect(got.length).toBe(want.length);
    got.forEach((row, i) => {
      expect([row[0]!.text, row[1]!.text]).toEqual([want[i]!.step, want[i]!.check]);
      expect(Number(row[4]!.value)).toBe(want[i]!.items);
      expect(row[4]!.text).toBe(new Intl.NumberFormat("en-US").format(Number(want[i]!.items)));
      expect(Number(row[5]!.value)).toBe(want[i]!.failed);
      if (want[i]!.worst_residual === null) expect(row[6]!.value).toBeUndefined();
      else expect(Number(row[6]!.value)).toBe(want[i]!.worst_residual);
    });
    const failing = await s.all(`SELECT residual FROM ${pq("audit.parquet")} WHERE row_kind = 'item' AND status = 'fail' ORDER BY severity = 'error' DESC, abs(residual) DESC`);
    const items = tableRows(html, "failing");
    expect(items.length).toBe(Math.min(50, failing.length));
    items.forEach((row, i) => expect(Number(row[5]!.value)).toBe(failing[i]!.residual));
    expect(html).toContain(`(${items.length} of ${failing.length})`);
  });

  it("lists each input file with its size and SHA-256, and each published table with its rows", async () => {
    const m = JSON.parse(readFileSync(path.join(run, "manifest.json"), "utf8")) as { inputs: { path: string }[] };
    const files = tableRows(html, "files");
    expect(files.length).toBe(m.inputs.length);
    for (const row of files) {
      const file = row[1]!.text;
      expect(Number(row[2]!.value)).toBe(statSync(file).size);
      expect(createHash("sha256").update(readFileSync(file)).digest("hex").startsWith(row[4]!.text)).toBe(true);
    }
    for (const row of tableRows(html, "outputs").filter((r) => r[3]!.text === "parquet")) {
      expect(Number(row[4]!.value)).toBe(await s.scalar(`SELECT count(*) FROM ${pq(row[5]!.text)}`));
    }
  });

  it("shows the Monte Carlo totals of the newest year and what drives them, as the uncertainty tables hold them", async () => {
    expect(html).toContain('<section id="uncertainty">');
    const rows = tableRows(html, "uncertainty");
    const all = rows.find((r) => r[0]!.text === "all series" && r[1]!.text === "stock")!;
    const want = await s.all(`SELECT central, q05, q95 FROM ${pq("stocks_uncertainty.parquet")} WHERE total_over = 'region,product' AND variable = 'stock' AND material IS NULL AND year = 2023`);
    expect(Number(all[2]!.value)).toBe(Number(want[0]!.central));
    expect(Number(all[3]!.value)).toBe(Number(want[0]!.q05));
    expect(Number(all[7]!.value)).toBe(Number(want[0]!.q95));
    const sens = tableRows(html, "sensitivity");
    const fo = await s.all(`SELECT assumption, first_order FROM ${pq("stocks_sensitivity.parquet")} WHERE total_over = 'region,product' AND variable = 'stock' AND year = 2023`);
    for (const f of fo) expect(Number(sens.find((r) => r[0]!.text === f.assumption)![1]!.value)).toBe(Number(f.first_order));
  });

  it("charts sums of the published tables; the scenario told apart from the history", async () => {
    const r = await RunReader.open(run);
    const specs = (await collectCharts(r)).flatMap((g) => g.items).flatMap((i) => ("spec" in i ? [i.spec] : []));
    r.close();
    type Row = { series: string; year: number; value: number; phase?: string; variable?: string };
    const data = (i: number) => (specs[i] as unknown as { data: { values: Row[] } }).data.values;
    // Consumption by region = the sum over products and materials of consumption.parquet.
    const f0 = factorOf(specs[0]!.title);
    const byRegion = await s.all(`SELECT region, CAST(year AS INTEGER) AS year, sum(consumption) AS v FROM ${pq("consumption.parquet")} GROUP BY ALL`);
    expect(data(0).length).toBe(byRegion.length);
    for (const w of byRegion) expect(close(data(0).find((x) => x.series === w.region && x.year === w.year)!.value * f0, Number(w.v))).toBe(true);
    // Stock by product: history from stocks.parquet, scenario from scenario.parquet, the seam after the last history year.
    const stock = data(2);
    const f2 = factorOf(specs[2]!.title);
    const last = Number(await s.scalar(`SELECT max(year) FROM ${pq("stocks.parquet")}`));
    for (const [file, phase, year] of [["stocks.parquet", "history", 1990], ["scenario.parquet", "scenario", 2050]] as const) {
      for (const w of await s.all(`SELECT product, sum(stock) AS v FROM ${pq(file)} WHERE year = ${year} GROUP BY ALL`)) {
        expect(close(stock.find((x) => x.series === w.product && x.year === year && x.phase === phase)!.value * f2, Number(w.v))).toBe(true);
      }
    }
    // Ranges: the band is the uncertainty table's 5 % and 95 % quantiles of the per-draw totals
    // over regions (never a sum of the regions' quantiles).
    const lohi = stock as (Row & { lo?: number; hi?: number })[];
    for (const w of await s.all(`SELECT product, q05, q95 FROM ${pq("stocks_uncertainty.parquet")} WHERE total_over = 'region' AND variable = 'stock' AND material IS NULL AND year = 2000`)) {
      const x = lohi.find((y) => y.series === w.product && y.year === 2000 && y.phase === "history")!;
      expect(close(x.lo! * f2, Number(w.q05))).toBe(true);
      expect(close(x.hi! * f2, Number(w.q95))).toBe(true);
      expect(x.lo!).toBeLessThan(x.hi!);
    }
    const spec = JSON.stringify(specs[2]);
    expect(spec).toContain('"mark":{"type":"area"');
    expect(spec).toContain('"strokeDash":{"field":"phase"');
    expect(spec).toContain(`"calculate":"${last + 0.5}"`);
    // Age structure: the stock of the newest year is the sum of what remains of each cohort
    // (the definition of a cohort model's stock; common practice, no source): the panels hold at least
    // 99.9 % of each product's stock in stocks.parquet and never more.
    const ages = data(5) as unknown as { series: string; age: number; value: number }[];
    const f5 = factorOf(specs[5]!.title);
    for (const w of await s.all(`SELECT product, sum(stock) AS v FROM ${pq("stocks.parquet")} WHERE year = ${last} GROUP BY ALL`)) {
      const drawn = ages.filter((x) => x.series === w.product).reduce((a, x) => a + x.value * f5, 0);
      expect(drawn).toBeGreaterThanOrEqual(0.999 * Number(w.v) * (1 - 1e-9));
      expect(drawn).toBeLessThanOrEqual(Number(w.v) * (1 + 1e-6));
    }
  });

  it("is the same document when rendered twice", async () => {
    expect(await renderReport(run)).toBe(html);
  });
});

describe("revisions", () => {
  let rel: { r1: string; r2: string };
  let rep: string;
  beforeAll(async () => {
    rel = twoReleases();
    rep = await renderReport(rel.r2);
  });

  it("a key holding groups (regions → region groups) traces its revisions to the changed source rows", async () => {
    // Production of ALD and BRV changed from 2018: every revised group figure has that cause (common practice, no source).
    const rows = await s.all(`SELECT cause, min(year) AS y0, count(*) AS n FROM read_parquet(${lit(path.join(rel.r2, "revisions", "consumption_by_group.parquet"))}) GROUP BY cause`);
    expect(rows.map((r) => r.cause)).toEqual(["input"]);
    expect(Number(rows[0]!.y0)).toBe(2018);
    expect(Number(rows[0]!.n)).toBeGreaterThan(0);
  });

  it("shows the release's own revisions/*.parquet: counts per table and the largest with their causes", async () => {
    expect(rep).toMatch(/release <strong>r2<\/strong>/);
    expect(rep).toContain("Revisions kept by this run");
    const tables = tableRows(rep, "revision-tables");
    expect(tables.length).toBeGreaterThan(3);
    for (const row of tables) {
      expect(Number(row[1]!.value)).toBe(await s.scalar(`SELECT count(*) FROM read_parquet(${lit(path.join(rel.r2, "revisions", `${row[0]!.text}.parquet`))})`));
    }
    const top = tableRows(rep, "revisions");
    expect(top.length).toBe(20);
    const files = tables.map((r) => lit(path.join(rel.r2, "revisions", `${r[0]!.text}.parquet`)));
    const largest = await s.scalar(`SELECT max(abs(revision)) FROM read_parquet([${files.join(", ")}], union_by_name = true)`);
    expect(Math.abs(Number(top[0]![6]!.value))).toBe(largest);
    for (const row of top) {
      const file = lit(path.join(rel.r2, "revisions", `${row[0]!.text}.parquet`));
      const n = await s.scalar(`SELECT count(*) FROM read_parquet(${file}) WHERE year = ${row[2]!.value} AND variable = ${lit(row[3]!.text)}
        AND revision = ${row[6]!.value} AND cause = ${lit(row[8]!.text)}`);
      expect(n).toBeGreaterThan(0);
    }
    expect(top.some((r) => r[8]!.text === "input" && r[9]!.text === "production")).toBe(true);
  });

  it("with --against computes the same revised figures between the two directories", async () => {
    const against = await renderReport(rel.r2, { against: rel.r1 });
    expect(against).toContain("Revisions computed for this report against");
    const count = (h: string) => Object.fromEntries(tableRows(h, "revision-tables").map((r) => [r[0]!.text, r[1]!.value]));
    expect(count(against)).toEqual(count(rep));
  });
});

describe("cairn report (command)", () => {
  it("every run writes report.html into its run directory: the document cairn report renders", async () => {
    const written = readFileSync(path.join(run, "report.html"), "utf8");
    expect(written).toBe(await renderReport(run));
  });

  it("writes RUN_DIR/report.html and prints its path; --out elsewhere", () => {
    const r = spawnSync(process.execPath, [REPORT_CLI, "report", run, "--quiet"], { encoding: "utf8" });
    expect(r.status).toBe(0);
    expect(r.stdout.trim()).toBe(path.join(run, "report.html"));
    expect(readFileSync(path.join(run, "report.html"), "utf8")).toContain("<!doctype html>");
    const out = path.join(tmp(), "r.html");
    const r2 = spawnSync(process.execPath, [REPORT_CLI, "report", run, "--out", out], { encoding: "utf8" });
    expect(r2.status).toBe(0);
    expect(r2.stderr).toMatch(/chart 1\/7 rendered/);
    expect(existsSync(out)).toBe(true);
  });

  it("exits 2 naming the directory and what is wrong", () => {
    const empty = tmp();
    const cases: [string[], RegExp][] = [
      [[empty], new RegExp(`${empty}: not a cairn run directory \\(no manifest.json\\)`)],
      [[path.join(empty, "nope")], /nope: no such directory/],
      [[run, "--against", empty], new RegExp(`--against ${empty}: not a completed cairn run directory`)],
      [[run, "--out", path.join(empty, "a", "b.html")], /the folder .*a does not exist/],
    ];
    for (const [args, msg] of cases) {
      const r = spawnSync(process.execPath, [REPORT_CLI, "report", ...args, "--quiet"], { encoding: "utf8" });
      expect(r.status, args.join(" ")).toBe(2);
      expect(r.stderr).toMatch(msg);
    }
  });

  it("reports a failed run as failed, with what it wrote", async () => {
    const dir = path.join(tmp(), "x");
    const r = spawnSync(process.execPath, [path.join(ROOT, "dist", "cli", "main.js"), "run", path.join(ROOT, "pipelines", "demo.yaml"), "--out", dir, "--quiet"],
      { encoding: "utf8", env: { ...process.env, CAIRN_FAULT: "after-step:stocks:oom" } });
    expect(r.status).toBe(6);
    const h = await renderReport(`${dir}.failed`);
    expect(h).toContain("This run failed</strong> (exit code 6)");
    expect(h).toContain("No charts: the run failed");
    expect(h).not.toMatch(/<script/i);
  });
});
