/**
 * The HTML report of a run directory: one self-contained file (inline CSS, charts as inline SVG,
 * no script, nothing loaded from outside), made of the manifest, audit.parquet, the published
 * tables and the revisions against the previous release.
 */
import { existsSync, readFileSync, statSync } from "node:fs";
import path from "node:path";
import { PipelineError } from "../errors.js";
import { collectCharts, type ChartGroup } from "./charts.js";
import { RunReader } from "./data.js";
import { CSS, esc } from "./html.js";
import { renderSvg } from "./render.js";
import { checkAgainst, findRevisions } from "./revisions.js";
import { uncertaintySection } from "./uncertainty.js";
import { auditSection, glance, inputsSection, methodSection, outputsSection, revisionsSection, titleSection, type RunManifest } from "./sections.js";

export interface ReportOptions {
  /** An earlier run directory to compare with (default: the run's own revisions, else its previous run). */
  against?: string;
  /** Progress lines (each chart rendered, …). */
  progress?: (msg: string) => void;
  /** The directory named in the report (default runDir): the runner renders in staging and names the final place. */
  displayDir?: string;
}

/** Checks that `dir` is a cairn run directory; its manifest, or an error (exit 2) saying what is wrong. */
export function checkRunDir(dir: string): RunManifest {
  if (!existsSync(dir)) throw new PipelineError(`${dir}: no such directory; give a cairn run directory (one with a manifest.json)`);
  if (!statSync(dir).isDirectory()) throw new PipelineError(`${dir}: not a directory; give a cairn run directory (one with a manifest.json)`);
  const file = path.join(dir, "manifest.json");
  if (!existsSync(file)) throw new PipelineError(`${dir}: not a cairn run directory (no manifest.json)`);
  let m: unknown;
  try {
    m = JSON.parse(readFileSync(file, "utf8"));
  } catch (e) {
    throw new PipelineError(`${dir}: not a cairn run directory (manifest.json is not valid JSON: ${(e as Error).message})`);
  }
  const x = m as Partial<RunManifest> | null;
  if (!x || typeof x !== "object" || x.tool?.name !== "cairn" || typeof x.pipeline?.name !== "string" || !Array.isArray(x.outputs) || typeof x.status !== "string") {
    throw new PipelineError(`${dir}: not a cairn run directory (manifest.json lacks tool.name "cairn", pipeline.name, status or outputs)`);
  }
  return x as RunManifest;
}

/** Element ids inside one chart made unique in the page (several SVGs share one document). */
function scopeIds(svg: string, prefix: string): string {
  return svg.replace(/\bid="([^"]+)"/g, `id="${prefix}-$1"`).replace(/url\(#([^)]+)\)/g, `url(#${prefix}-$1)`).replace(/href="#([^"]+)"/g, `href="#${prefix}-$1"`);
}

async function chartsSection(groups: ChartGroup[], progress: (m: string) => void, empty: string): Promise<string> {
  const total = groups.reduce((n, g) => n + g.items.filter((i) => "spec" in i).length, 0);
  let k = 0;
  const parts: string[] = [];
  for (const g of groups) {
    parts.push(`<h3>${esc(g.heading)}</h3>${g.intro ? `<p class="muted">${esc(g.intro)}</p>` : ""}`);
    for (const item of g.items) {
      if ("note" in item) {
        parts.push(`<p class="notice">${esc(item.note)}</p>`);
        continue;
      }
      const t0 = performance.now();
      const svg = scopeIds(await renderSvg(item.spec), `c${++k}`);
      progress(`chart ${k}/${total} rendered: ${item.spec.title} (${(performance.now() - t0).toFixed(0)} ms, ${Math.round(svg.length / 1024)} KiB)`);
      parts.push(`<figure class="chart" id="chart-${k}">${svg}<figcaption>${esc(item.spec.description)}</figcaption></figure>`);
    }
  }
  if (!groups.length) parts.push(`<p>${esc(empty)}</p>`);
  return `<section id="charts"><h2>Charts</h2>${parts.join("\n")}</section>`;
}

/** The report of a run directory, as one HTML document. */
export async function renderReport(runDir: string, opts: ReportOptions = {}): Promise<string> {
  const progress = opts.progress ?? (() => {});
  const m = checkRunDir(runDir);
  if (opts.against !== undefined) checkAgainst(opts.against);
  const dir = path.resolve(runDir);
  const r = await RunReader.open(dir);
  try {
    progress(`reading ${dir}`);
    const inputs = await inputsSection(r, m);
    const audit = await auditSection(r, m);
    progress("collecting chart data");
    const groups = m.status === "ok" ? await collectCharts(r) : [];
    const charts = await chartsSection(groups, progress, m.status === "ok" ? "This run publishes no apparent-consumption or cohort-model table to chart." : "No charts: the run failed, and a failed run publishes no tables.");
    const nCharts = groups.reduce((n, g) => n + g.items.filter((i) => "spec" in i).length, 0);
    const ranges = m.status === "ok" ? await uncertaintySection(r, m) : "";
    progress(opts.against ? `computing revisions against ${opts.against}` : "reading revisions");
    const rev = m.status === "ok" ? await findRevisions(r, opts.against) : null;
    const title = `${m.pipeline.name}${m.release ? ` ${m.release.id}` : ""} — cairn report`;
    const toc = [["inputs", "Inputs"], ["audit", "Audit"], ["charts", "Charts"], ...(ranges ? [["uncertainty", "Uncertainty"]] : []), ["outputs", "Published tables"], ["revisions", "Revisions"], ["method", "Method and caution"]]
      .map(([id, label]) => `<a href="#${id}">${label}</a>`).join("");
    return `<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta name="generator" content="cairn ${esc(m.tool?.version ?? "")}">
<title>${esc(title)}</title>
<style>${CSS}</style>
</head>
<body>
<main>
${titleSection(m, opts.displayDir ?? runDir)}
${glance(m, rev, nCharts)}
<nav class="toc" aria-label="Contents">${toc}</nav>
${inputs}
${audit}
${charts}
${ranges}
${m.status === "ok" ? outputsSection(m) : ""}
${revisionsSection(rev, m)}
${methodSection(m)}
<footer>Made by cairn ${esc(m.tool?.version ?? "")} from the run directory's manifest.json and Parquet files. This file is self-contained: no script, nothing loaded from elsewhere.</footer>
</main>
</body>
</html>
`;
  } finally {
    r.close();
  }
}
