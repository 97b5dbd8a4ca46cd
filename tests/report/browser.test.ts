/**
 * The demo report in a real browser (Debian's Chromium driven by playwright-core): opened with
 * file://, it makes no request at all, logs no error, draws every chart as SVG with marks and a
 * text alternative, and its tables show the values of the Parquet files.
 */
import { afterAll, beforeAll, describe, expect, it } from "vitest";
import { existsSync, mkdtempSync, rmSync, writeFileSync } from "node:fs";
import { tmpdir } from "node:os";
import path from "node:path";
import { pathToFileURL } from "node:url";
import { chromium, type BrowserContext, type Page } from "playwright-core";
import { Session } from "../../src/engine/session.js";
import { lit } from "../../src/engine/sql.js";
import { renderReport } from "../../src/report/report.js";
import { demoRun } from "./helpers.js";

const CHROMIUM = "/usr/bin/chromium";
const HAVE = existsSync(CHROMIUM);
if (!HAVE) console.warn(`tests/report/browser.test.ts: skipped, no Chromium at ${CHROMIUM} (Debian: apt-get install chromium; CI installs it)`);

describe.skipIf(!HAVE)("the report in Chromium", () => {
  let run: string;
  let profile: string;
  let ctx: BrowserContext;
  let page: Page;
  const requests: string[] = [];
  const errors: string[] = [];

  beforeAll(async () => {
    run = demoRun();
    const file = path.join(run, "report.html");
    writeFileSync(file, await renderReport(run));
    profile = mkdtempSync(path.join(tmpdir(), "cairn-chromium-"));
    ctx = await chromium.launchPersistentContext(profile, {
      executablePath: CHROMIUM,
      headless: true,
      args: ["--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-quic"],
      viewport: { width: 1200, height: 900 },
    });
    page = await ctx.newPage();
    page.on("request", (r) => {
      if (!/^(file|data|about):/.test(r.url())) requests.push(r.url());
    });
    page.on("console", (m) => {
      if (m.type() === "error") errors.push(m.text());
    });
    page.on("pageerror", (e) => errors.push(String(e)));
    await page.goto(pathToFileURL(file).href, { waitUntil: "load" });
  });

  afterAll(async () => {
    await ctx?.close();
    if (profile) rmSync(profile, { recursive: true, force: true });
  });

  it("loads with no request beyond the file, no console error and no script", async () => {
    expect(await page.title()).toMatch(/^demo — cairn report$/);
    expect(requests).toEqual([]);
    expect(errors).toEqual([]);
    expect(await page.evaluate(() => document.scripts.length)).toBe(0);
    expect(await page.evaluate(() => document.characterSet)).toBe("UTF-8");
  });

  it("draws every chart as an svg element with marks, a size and a text alternative", async () => {
    const charts = await page.$$eval("figure.chart", (figs) => figs.map((f) => {
      const svg = f.querySelector(":scope > svg");
      const box = svg?.getBoundingClientRect();
      return {
        svg: Boolean(svg),
        label: svg?.getAttribute("aria-label") ?? "",
        title: svg?.querySelector("title")?.textContent ?? "",
        marks: svg ? svg.querySelectorAll("path, rect, line").length : 0,
        paths: svg ? [...svg.querySelectorAll("path")].filter((p) => (p.getAttribute("d") ?? "").length > 20).length : 0,
        width: box?.width ?? 0,
        height: box?.height ?? 0,
      };
    }));
    expect(charts.length).toBe(7);
    for (const c of charts) {
      expect(c.svg).toBe(true);
      expect(c.label.length + c.title.length).toBeGreaterThan(20);
      expect(c.marks).toBeGreaterThan(10);
      expect(c.paths).toBeGreaterThan(0);
      expect(c.width).toBeGreaterThan(300);
      expect(c.height).toBeGreaterThan(150);
    }
  });

  it("shows in its tables the numbers of the Parquet files", async () => {
    const s = await Session.open({ threads: 1 });
    try {
      const rows = await page.$$eval("table.checks tbody tr", (trs) => trs.map((tr) => [...tr.querySelectorAll("td")].map((td) => ({ text: td.textContent ?? "", value: td.getAttribute("data-value") }))));
      const want = await s.all(`SELECT step, "check", items, failed FROM read_parquet(${lit(path.join(run, "audit.parquet"))}) WHERE row_kind = 'summary'`);
      expect(rows.length).toBe(want.length);
      rows.forEach((r, i) => {
        expect(r[0]!.text).toBe(want[i]!.step);
        expect(r[1]!.text).toBe(want[i]!.check);
        expect(Number(r[4]!.value)).toBe(want[i]!.items);
        expect(r[4]!.text).toBe(Number(want[i]!.items).toLocaleString("en-US"));
        expect(Number(r[5]!.value)).toBe(want[i]!.failed);
      });
      const outputs = await page.$$eval("table.outputs tbody tr", (trs) => trs.map((tr) => [...tr.querySelectorAll("td")].map((td) => ({ text: td.textContent ?? "", value: td.getAttribute("data-value") }))));
      const parquet = outputs.filter((r) => r[3]!.text === "parquet");
      expect(parquet.length).toBeGreaterThan(5);
      for (const r of parquet) expect(Number(r[4]!.value)).toBe(await s.scalar(`SELECT count(*) FROM read_parquet(${lit(path.join(run, r[5]!.text))})`));
      const residual = await page.$eval("table.failing tbody tr td:nth-child(6)", (td) => td.getAttribute("data-value"));
      const worst = await s.scalar(`SELECT residual FROM read_parquet(${lit(path.join(run, "audit.parquet"))}) WHERE row_kind = 'item' AND status = 'fail' ORDER BY severity = 'error' DESC, abs(residual) DESC LIMIT 1`);
      expect(Number(residual)).toBe(worst);
    } finally {
      s.close();
    }
  });
});
