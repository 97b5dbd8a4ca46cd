/** Shared by the report tests: demo runs and a small reader of the report's tables. */
import { cpSync, readFileSync, writeFileSync } from "node:fs";
import path from "node:path";
import { cli, ROOT, tmp } from "../helpers.js";

export const DEMO = path.join(ROOT, "pipelines", "demo.yaml");

/** A fresh demo run directory. */
export function demoRun(): string {
  const dir = path.join(tmp("cairn-report-"), "demo");
  const r = cli(["demo", "--out", dir, "--quiet"]);
  if (r.code !== 0) throw new Error(`demo run failed (${r.code}): ${r.stderr}`);
  return dir;
}

/** Two releases r1 and r2 in a catalog: r2 with production of two regions raised 8 % from 2018. */
export function twoReleases(): { cat: string; r1: string; r2: string } {
  const base = tmp("cairn-report-rel-");
  const cat = path.join(base, "catalog");
  const data = path.join(base, "data");
  cpSync(path.join(ROOT, "data-samples", "demo"), data, { recursive: true });
  const file = path.join(data, "production.csv");
  const lines = readFileSync(file, "utf8").trimEnd().split("\n");
  const changed = lines.map((l, i) => {
    const [region, commodity, year, q] = l.split(",");
    if (i === 0 || !["ALD", "BRV"].includes(region!) || Number(year) < 2018) return l;
    return [region, commodity, year, String(Math.round(Number(q) * 1.08 * 1000) / 1000)].join(",");
  });
  writeFileSync(file, changed.join("\n") + "\n");
  for (const [id, extra] of [["r1", []], ["r2", ["--set", `data=${data}`]]] as const) {
    const r = cli(["run", DEMO, "--release", id, "--catalog", cat, "--quiet", ...extra]);
    if (r.code !== 0) throw new Error(`release ${id} failed (${r.code}): ${r.stderr}`);
  }
  return { cat, r1: path.join(cat, "r1"), r2: path.join(cat, "r2") };
}

export interface CellText {
  text: string;
  value?: string;
}

/** The body rows of the report's table with class `cls`: each cell's text and data-value. */
export function tableRows(html: string, cls: string): CellText[][] {
  const m = new RegExp(`<table class="${cls}">([\\s\\S]*?)</table>`).exec(html);
  if (!m) throw new Error(`no table of class ${cls}`);
  const body = m[1]!.split("<tbody>")[1] ?? "";
  return [...body.matchAll(/<tr>([\s\S]*?)<\/tr>/g)].map((r) =>
    [...r[1]!.matchAll(/<td([^>]*)>([\s\S]*?)<\/td>/g)].map((c) => ({
      text: c[2]!.replace(/<[^>]+>/g, "").replace(/&#8239;/g, "\u202f").replace(/&amp;/g, "&").replace(/&#39;/g, "'").replace(/&quot;/g, '"').replace(/&lt;/g, "<").replace(/&gt;/g, ">"),
      value: /data-value="([^"]*)"/.exec(c[1]!)?.[1],
    })));
}

/** The inline SVG charts of a report, with their figure captions. */
export function charts(html: string): string[] {
  return [...html.matchAll(/<figure class="chart"[^>]*>([\s\S]*?)<\/figure>/g)].map((m) => m[1]!);
}

/**
 * A run with more series than a chart keeps: 40 products × 2 regions, 14 materials, 14 consuming
 * regions; a history (with its by-cohort table and Monte Carlo ranges) and a scenario that
 * continues it (no by-cohort table, so the mean age is charted). Invented figures.
 */
export function manySeriesRun(): string {
  const base = tmp("cairn-report-many-");
  const years = (a: number, b: number) => Array.from({ length: b - a + 1 }, (_, i) => a + i);
  const products = Array.from({ length: 40 }, (_, i) => `p${String(i + 1).padStart(2, "0")}`);
  const regions = ["NOR", "SUD"];
  const materials = Array.from({ length: 14 }, (_, i) => `m${String(i + 1).padStart(2, "0")}`);
  const inflow = (from: number, to: number) => ["region,product,year,value", ...regions.flatMap((r, ri) => products.flatMap((p, pi) =>
    years(from, to).map((y) => `${r},${p},${y},${(((pi + 1) ** 1.5) * (1 + 0.04 * (y - 2000)) * (ri ? 0.7 : 1.3) + (pi % 3)).toFixed(3)}`)))].join("\n");
  const content = ["material,content", ...materials.map((m, i) => `${m},${(0.005 + 0.01 * i).toFixed(3)}`)].join("\n");
  const consumers = Array.from({ length: 14 }, (_, i) => `Q${String(i + 1).padStart(2, "0")}`);
  const production = ["region,commodity,year,quantity", ...consumers.flatMap((c, i) => years(2000, 2011).map((y) => `${c},ore,${y},${(100 + 37 * i + 3 * (y - 2000)).toFixed(1)}`))].join("\n");
  const trade = ["reporter,partner,commodity,flow,year,quantity", ...consumers.slice(0, 4).map((c, i) => `${c},${consumers[i + 5]},ore,export,2005,${10 + i}`)].join("\n");
  const files: Record<string, string> = {
    "hist.csv": inflow(2000, 2011),
    "scen.csv": inflow(2012, 2016),
    "lifetimes.csv": "distribution,mean,sd\nnormal,9,3",
    "content.csv": content,
    "production.csv": production,
    "trade.csv": trade,
    "concordance.csv": "commodity,product,material,factor,share\nore,metal,iron,1,1",
  };
  for (const [name, text] of Object.entries(files)) writeFileSync(path.join(base, name), text + "\n");
  const flows = (file: string) => `
    path: ${file}
    unit: t
    columns: { region: { type: text, key: true }, product: { type: text, key: true }, year: { type: integer, key: true }, value: quantity }`;
  writeFileSync(path.join(base, "p.yaml"), `name: many
base_unit: t
sources:
  hist_inflow:${flows("hist.csv")}
  scen_inflow:${flows("scen.csv")}
  lifetimes:
    path: lifetimes.csv
    columns: { distribution: text, mean: number, sd: number }
  content:
    path: content.csv
    columns: { material: text, content: number }
  production:
    path: production.csv
    unit: t
    columns: { region: { type: text, key: true }, commodity: { type: text, key: true }, year: { type: integer, key: true }, quantity: quantity }
  trade:
    path: trade.csv
    unit: t
    columns: { reporter: { type: text, key: true }, partner: { type: text, key: true }, commodity: { type: text, key: true }, flow: { type: text, key: true }, year: { type: integer, key: true }, quantity: quantity }
  concordance:
    path: concordance.csv
    columns: { commodity: text, product: text, material: text, factor: number, share: number }
steps:
  - id: consumption
    kind: apparent-consumption
    production: production
    trade: trade
    concordance: concordance
    keys: [region, product, material]
  - id: hist
    kind: cohort-model
    mode: inflow-driven
    input: hist_inflow
    keys: [region, product]
    lifetimes: lifetimes
    content: content
    by_cohort: true
    uncertainty: { draws: 20, seed: 7, lifetimes: { mean: { family: normal, rel_sd: 0.1, truncate_below: 0 } }, totals: [[], [product]] }
  - id: scen
    kind: cohort-model
    mode: inflow-driven
    input: scen_inflow
    keys: [region, product]
    lifetimes: lifetimes
    content: content
    continues: { step: hist, year: 2011 }
`);
  const dir = path.join(base, "run");
  const r = cli(["run", path.join(base, "p.yaml"), "--out", dir, "--quiet"]);
  if (r.code !== 0) throw new Error(`many-series run failed (${r.code}): ${r.stderr}`);
  return dir;
}
