#!/usr/bin/env node
// Figures of a demo run directory, for the README: the history–scenario seam (inflow, outflow,
// mean stock age from the last history year to the first scenario year), material stock ÷
// product stock, and the vehicle fleet's growth. Usage: node scripts/demo-figures.mjs [RUN_DIR]
import { DuckDBInstance } from "@duckdb/node-api";
const dir = process.argv[2] ?? "runs/demo";
const c = await (await DuckDBInstance.create(":memory:")).connect();
const q = async (s) => (await c.runAndReadAll(s.replaceAll("$D", dir))).getRowObjectsJS();
const pct = (a, b) => `${(100 * (b / a - 1)).toFixed(1)} %`;
const all = await q(`WITH h AS (SELECT sum(inflow) i, sum(outflow) o, sum(stock * mean_age_stock) / sum(stock) a, sum(stock) s FROM '$D/stocks.parquet' WHERE year = 2023),
  f AS (SELECT sum(inflow) i, sum(outflow) o, sum(stock * mean_age_stock) / sum(stock) a, sum(stock) s FROM '$D/scenario.parquet' WHERE year = 2024)
  SELECT h.i hi, f.i fi, h.o ho, f.o fo, h.a ha, f.a fa, h.s hs, f.s fs FROM h, f`);
const a = all[0];
console.log(`all series, 2023 → 2024: inflow ${(a.hi / 1e6).toFixed(2)} → ${(a.fi / 1e6).toFixed(2)} Mt (${pct(a.hi, a.fi)}), outflow ${(a.ho / 1e6).toFixed(2)} → ${(a.fo / 1e6).toFixed(2)} Mt (${pct(a.ho, a.fo)}), mean stock age ${a.ha.toFixed(2)} → ${a.fa.toFixed(2)} years, stock ${(a.hs / 1e6).toFixed(1)} → ${(a.fs / 1e6).toFixed(1)} Mt`);
const per = await q(`SELECT h.product, sum(h.inflow) hi, sum(f.inflow) fi, sum(h.outflow) ho, sum(f.outflow) fo,
    sum(h.stock * h.mean_age_stock) / sum(h.stock) ha, sum(f.stock * f.mean_age_stock) / sum(f.stock) fa
  FROM '$D/stocks.parquet' h JOIN '$D/scenario.parquet' f USING (region, product) WHERE h.year = 2023 AND f.year = 2024 GROUP BY 1 ORDER BY 1`);
for (const r of per) console.log(`  ${r.product.padEnd(10)} inflow ${pct(r.hi, r.fi).padStart(8)}, outflow ${pct(r.ho, r.fo).padStart(8)}, mean age ${r.ha.toFixed(2)} → ${r.fa.toFixed(2)}`);
const rp = await q(`SELECT min(f.outflow / h.outflow - 1) lo, max(f.outflow / h.outflow - 1) hi, min(f.inflow / h.inflow - 1) ilo, max(f.inflow / h.inflow - 1) ihi
  FROM '$D/stocks.parquet' h JOIN '$D/scenario.parquet' f USING (region, product) WHERE h.year = 2023 AND f.year = 2024 AND h.outflow > 0 AND h.inflow > 0`);
console.log(`per region and product: outflow ${(100 * rp[0].lo).toFixed(1)} % to ${(100 * rp[0].hi).toFixed(1)} %, inflow ${(100 * rp[0].ilo).toFixed(1)} % to ${(100 * rp[0].ihi).toFixed(1)} %`);
const m = await q(`SELECT p.year, sum(m.stock) / 1e6 AS materials, any_value(p.stock) / 1e6 AS products FROM (SELECT year, sum(stock) stock FROM '$D/stocks.parquet' GROUP BY 1) p
  JOIN '$D/stocks_materials.parquet' m USING (year) WHERE p.year IN (1990, 2023) GROUP BY 1 ORDER BY 1`);
for (const r of m) console.log(`material stock ÷ product stock ${r.year}: ${r.materials.toFixed(1)} Mt / ${r.products.toFixed(1)} Mt`);
const ms = await q(`SELECT m.year, sum(m.stock) / 1e6 AS materials, any_value(p.stock) / 1e6 AS products FROM (SELECT year, sum(stock) stock FROM '$D/scenario.parquet' GROUP BY 1) p
  JOIN '$D/scenario_materials.parquet' m USING (year) WHERE p.year IN (2024, 2050) GROUP BY 1 ORDER BY 1`);
for (const r of ms) console.log(`material stock ÷ product stock ${r.year}: ${r.materials.toFixed(1)} Mt / ${r.products.toFixed(1)} Mt`);
const v = await q(`SELECT year, sum(stock) / 1e6 s, sum(inflow) / 1e6 i, sum(outflow) / 1e6 o FROM '$D/stocks.parquet' WHERE product = 'vehicles' AND year IN (1990, 2004) GROUP BY 1 ORDER BY 1`);
console.log(`vehicle fleet: ${v[0].s.toFixed(2)} Mt (1990; inflow ${v[0].i.toFixed(3)}, outflow ${v[0].o.toFixed(3)} Mt/yr) → ${v[1].s.toFixed(2)} Mt (2004): ${pct(v[0].s, v[1].s)}`);
const mix = await q(`WITH m AS (SELECT product, material, sum(inflow) AS model FROM '$D/stocks_materials.parquet' WHERE year BETWEEN 2010 AND 2023 GROUP BY ALL),
  c AS (SELECT product, material, sum(greatest(consumption, 0)) AS cons FROM '$D/consumption.parquet' WHERE year BETWEEN 2010 AND 2023 GROUP BY ALL)
  SELECT product, material, model / 1e6 AS model, cons / 1e6 AS cons FROM m JOIN c USING (product, material) ORDER BY 1, 2`);
console.log("material inflow to stock vs material apparent consumption, 2010–2023 (Mt):");
for (const r of mix) console.log(`  ${r.product.padEnd(10)} ${r.material.padEnd(10)} ${r.model.toFixed(2).padStart(8)} vs ${r.cons.toFixed(2).padStart(8)} (${pct(r.cons, r.model)})`);
