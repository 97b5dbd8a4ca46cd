import { describe, expect, it } from "vitest";
import path from "node:path";
import { loadPipeline } from "../../src/spec/load.js";
import { runPipeline } from "../../src/run/runner.js";
import { Session } from "../../src/engine/session.js";
import { nativeReader, useNativeReader } from "../../src/engine/handoff.js";
import { nativePartsUsed } from "../../src/ops/concordance-native.js";
import { BASIC_SOURCES, tmp, write } from "../helpers.js";

// The concordance's partial sums from native/concsum.c must be the ones DuckDB's join and
// grouping give (src/ops/concordance-map.ts), to the last bit: the same pipeline is run with the
// native library and without it, and every output and audit row compared. The reference (the
// SQL) is checked by hand in tests/steps/apparent-consumption.test.ts.

/** A small deterministic generator (invented data for the comparison only). */
function lcg(seed: number) {
  let x = seed >>> 0;
  return () => ((x = (Math.imul(x, 1664525) + 1013904223) >>> 0) / 2 ** 32);
}

function dataset(seed: number) {
  const rnd = lcg(seed);
  const regions = ["Avel", "Brun", "Corra", "Dalm", "Esk", "Fenn"];
  const commodities = ["c01", "c02", "c03", "c04", "c05", "car", "van", "c99"]; // c99: not in the concordance
  const pick = <T,>(a: T[]) => a[Math.floor(rnd() * a.length)]!;
  // Quantities with many decimals, halves of a gram (round half away from zero), large and small values.
  const qty = () => {
    const r = rnd();
    if (r < 0.1) return (Math.floor(rnd() * 100) + 0.5) / 1e6; // x.5 g in t
    if (r < 0.2) return Math.floor(rnd() * 1e9) / 7;
    return Math.round(rnd() * 1e7) / 1e4;
  };
  const prod = new Map<string, string>();
  for (let i = 0; i < 400; i++) {
    const k = `${pick(regions)},${pick(commodities)},${2000 + Math.floor(rnd() * 6)}`;
    prod.set(k, `${k},${qty()}`);
  }
  const trade = new Map<string, string>();
  for (let i = 0; i < 900; i++) {
    const a = pick(regions);
    let b = pick(regions);
    if (b === a) b = regions[(regions.indexOf(a) + 1) % regions.length]!;
    const c = pick(commodities);
    const flow = rnd() < 0.5 ? "import" : "export";
    const y = 2000 + Math.floor(rnd() * 6);
    // cars and vans counted in pieces; vans have no unit mass (their mass is unknown: kept unmapped)
    const unit = c === "car" || c === "van" ? "pieces" : "t";
    trade.set(`${a},${b},${c},${flow},${y}`, `${a},${b},${c},${flow},${y},${unit === "pieces" ? Math.floor(rnd() * 5000) : qty()},${unit}`);
  }
  // Years 2000–2005 for everyone but region Fenn in 2005, which mirror fill completes.
  const tradeRows = [...trade.values()].filter((r) => !(r.startsWith("Fenn,") && r.includes(",2005,")));
  return {
    "production.csv": "region,commodity,year,quantity\n" + [...prod.values()].join("\n") + "\n",
    "trade.csv": "reporter,partner,commodity,flow,year,quantity,unit\n" + tradeRows.join("\n") + "\n",
    "conc.csv": "commodity,product,material,factor,share,unit_mass\n" +
      "c01,frames,steel,0.93,0.6,\nc01,frames,copper,0.93,0.4,\n" +
      "c02,frames,steel,1,1,\n" +
      "c03,pipes,copper,0.8,0.25,\nc03,pipes,steel,0.8,0.35,\nc03,cables,copper,0.7,0.4,\n" +
      "c04,cables,aluminium,0.333333333333,1,\n" +
      "c05,pipes,plastic,1.1,0.5,\nc05,frames,plastic,1.1,0.5,\n" +
      "car,vehicles,steel,1,0.7,1.4\ncar,vehicles,aluminium,1,0.3,1.4\n" +
      "van,vehicles,steel,1,1,\n",
  };
}

async function runBoth(files: Record<string, string>, step: string) {
  const conc = `  conc:\n    path: conc.csv\n    unit: t\n    columns: { commodity: text, product: text, material: text, factor: number, share: number, unit_mass: { type: quantity, nullable: true } }\n`;
  const sources = BASIC_SOURCES.replace("    path: trade.csv\n    unit: t\n", "    path: trade.csv\n    unit_column: unit\n") + "      unit: text\n" + conc;
  const dir = tmp();
  // the invented data leave much mass unmapped and trade asymmetric: warnings, not errors
  write(dir, { "p.yaml": `name: t\naudit: { unmapped_limit_severity: warning, asymmetry_severity: warning }\n${sources}\nsteps:\n${step}`, ...files });
  const runs: string[] = [];
  for (const native of [true, false]) {
    useNativeReader(native);
    const used = nativePartsUsed.count;
    try {
      const r = await runPipeline(loadPipeline(path.join(dir, "p.yaml")), { out: path.join(dir, native ? "native" : "sql") });
      expect(r.error ?? r.status).toBe("ok");
      expect(nativePartsUsed.count - used).toBe(native ? 1 : 0);
      runs.push(r.run_dir);
    } finally {
      useNativeReader(true);
    }
  }
  return runs;
}

describe("concordance sums outside DuckDB's join (native/concsum.c) = DuckDB's join and grouping", () => {
  it.each([
    ["region, material", "[region, material]", 1],
    ["region, product, material", "[region, product, material]", 2],
    ["material only", "[material]", 3],
  ])("keys %s: every output and audit row the same", async (_label, keys, seed) => {
    expect(nativeReader()).not.toBeNull(); // built by npm ci (scripts/build-native.mjs)
    const [native, sql] = await runBoth(dataset(seed),
      `  - id: ac\n    kind: apparent-consumption\n    production: production\n    trade: trade\n    concordance: conc\n    mirror_fill: true\n    keys: ${keys}\n`);
    const s = await Session.open();
    try {
      for (const t of ["ac", "ac_unmapped"]) {
        const a = await s.all(`SELECT * FROM '${native}/${t}.parquet'`);
        const b = await s.all(`SELECT * FROM '${sql}/${t}.parquet'`);
        expect(a.length).toBeGreaterThan(0);
        expect(a).toEqual(b);
      }
      const audit = (d: string) => s.all(`SELECT * FROM '${d}/audit.parquet' ORDER BY ALL`);
      const a = await audit(native);
      expect(a.length).toBeGreaterThan(10);
      expect(a).toEqual(await audit(sql));
      // the data exercise what they should: unmapped mass, goods that cannot be weighed, mirrored rows
      const un = await s.all(`SELECT DISTINCT reason FROM '${native}/ac_unmapped.parquet' ORDER BY 1`);
      expect(un.map((x) => x.reason)).toEqual(["commodity not in the concordance", "counted in pieces but the concordance gives no unit_mass"]);
      if (keys !== "[material]") expect(Number((await s.one(`SELECT count(*) FILTER (WHERE mirrored) AS n FROM '${native}/ac.parquet'`)).n)).toBeGreaterThan(0);
    } finally {
      s.close();
    }
  }, 120_000);
});
