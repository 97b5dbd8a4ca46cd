#!/usr/bin/env node
// The README's two charts of the demo, made from a demo run directory by the project's own chart
// code (dist/report): stock by product and stock by material, history and scenario.
// Usage: node scripts/demo-charts.mjs [RUN_DIR] [OUT_DIR]   (after npm run build and npm run demo)
import { mkdirSync, writeFileSync } from "node:fs";
import path from "node:path";
import { RunReader, sumByYear } from "../dist/report/data.js";
import { renderSvg, yearFacets } from "../dist/report/render.js";
const dir = process.argv[2] ?? "runs/demo";
const out = process.argv[3] ?? "docs";
mkdirSync(out, { recursive: true });
const r = await RunReader.open(dir);
const mt = (rows) => rows.map((x) => ({ ...x, value: x.value / 1e6 }));
const products = mt(await sumByYear(r, "stock", "product", (s) => s.id));
const materials = mt(await sumByYear(r, "stock", "material", (s) => `${s.id}_materials`));
const seam = Math.max(...products.filter((x) => x.phase === "history").map((x) => x.year)) + 0.5;
const charts = [
  ["demo-stock-products.svg", yearFacets({ title: "Demo: stock in use by product, all regions (Mt)", description: `Stock in use by product, summed over the five invented regions, from 1990 to 2050: the inflow-driven history (solid) and the stock-driven scenario that continues it (dashed) from ${seam + 0.5}.`, rows: products, yTitle: "stock (Mt)", seriesTitle: "product", seam })],
  ["demo-stock-materials.svg", yearFacets({ title: "Demo: material stock in use, all regions (Mt)", description: "Material stock in use by material (every cohort with its own content, the stock in place in 1989 included), history solid, scenario dashed.", rows: materials, yTitle: "stock (Mt)", seriesTitle: "material", seam })],
];
for (const [file, spec] of charts) {
  writeFileSync(path.join(out, file), await renderSvg(spec));
  console.log(`wrote ${path.join(out, file)}`);
}
r.close();
