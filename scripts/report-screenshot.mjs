#!/usr/bin/env node
// The README's picture of the HTML report: runs the demo into a temporary folder, writes its
// report, opens it in Chromium (offline, file://) and saves the top of the page as a PNG.
// Usage: node scripts/report-screenshot.mjs [OUT_PNG] [CHROMIUM]   (after npm run build)
// Defaults: docs/report.png and /usr/bin/chromium.
import { spawnSync } from "node:child_process";
import { existsSync, mkdtempSync, rmSync, writeFileSync } from "node:fs";
import { tmpdir } from "node:os";
import path from "node:path";
import { fileURLToPath, pathToFileURL } from "node:url";
import { chromium } from "playwright-core";
import { renderReport } from "../dist/report/report.js";

const root = path.resolve(path.dirname(fileURLToPath(import.meta.url)), "..");
const out = path.resolve(process.argv[2] ?? path.join(root, "docs", "report.png"));
const browser = process.argv[3] ?? "/usr/bin/chromium";
if (!existsSync(browser)) {
  console.error(`report-screenshot: no Chromium at ${browser}; install it (Debian: apt-get install chromium) or give its path as the second argument`);
  process.exit(2);
}
const work = mkdtempSync(path.join(tmpdir(), "cairn-report-shot-"));
try {
  const run = path.join(work, "demo");
  const r = spawnSync(process.execPath, [path.join(root, "dist", "cli", "main.js"), "demo", "--out", run, "--quiet"], { stdio: ["ignore", "ignore", "inherit"] });
  if (r.status !== 0) throw new Error(`the demo run failed (exit ${r.status})`);
  const t0 = performance.now();
  // The report names the run directory as given: a relative name, not the temporary path.
  process.chdir(work);
  const html = await renderReport("demo");
  console.log(`report rendered in ${((performance.now() - t0) / 1000).toFixed(2)} s (${Math.round(html.length / 1024)} KiB)`);
  const file = path.join(work, "report.html");
  writeFileSync(file, html);
  const b = await chromium.launch({
    executablePath: browser,
    headless: true,
    args: ["--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-quic"],
  });
  try {
    const page = await b.newPage({ viewport: { width: 1100, height: 1000 }, deviceScaleFactor: 1 });
    await page.route(/^(?!file:|data:|about:)/, (route) => route.abort());
    await page.goto(pathToFileURL(file).href);
    await page.screenshot({ path: out, clip: { x: 0, y: 0, width: 1100, height: 1000 } });
  } finally {
    await b.close();
  }
  console.log(`wrote ${out}`);
} finally {
  rmSync(work, { recursive: true, force: true });
}
