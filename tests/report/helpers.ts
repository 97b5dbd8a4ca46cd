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
