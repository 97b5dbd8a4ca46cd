import { describe, expect, it } from "vitest";
import path from "node:path";
import { loadPipeline } from "../../src/spec/load.js";
import { runPipeline } from "../../src/run/runner.js";
import { Session } from "../../src/engine/session.js";
import { BASIC_SOURCES, tmp, write } from "../helpers.js";

async function runCase(files: Record<string, string>, step: string, extraSources = "", sources = BASIC_SOURCES) {
  const dir = tmp();
  write(dir, {
    "p.yaml": `name: t\n${sources}${extraSources}\nsteps:\n${step}`,
    ...files,
  });
  const out = path.join(dir, "out");
  const r = await runPipeline(loadPipeline(path.join(dir, "p.yaml")), { out });
  const s = await Session.open();
  const q = (sql: string) => s.all(sql.replaceAll("$OUT", r.run_dir));
  return { r, q, close: () => s.close() };
}

describe("apparent consumption = production + imports − exports (definition; common practice, no source)", () => {
  it("hand-computed case, with negative results audited", async () => {
    const { r, q, close } = await runCase({
      "production.csv": "region,commodity,year,quantity\nA,c1,2000,100\nB,c1,2000,20\nA,c1,2001,90\n",
      // A exports 30 to B and imports 5 from C; B reports importing 30 from A and exporting 60 to C (B: 20 + 30 − 60 = −10).
      "trade.csv": "reporter,partner,commodity,flow,year,quantity\nA,B,c1,export,2000,30\nA,C,c1,import,2000,5\nB,A,c1,import,2000,30\nB,C,c1,export,2000,60\nA,B,c1,export,2001,10\n",
    }, `  - id: ac\n    kind: apparent-consumption\n    production: production\n    trade: trade\n    negative: flag\n`);
    expect(r.status).toBe("ok");
    const rows = await q(`SELECT * FROM '$OUT/ac.parquet' ORDER BY region, commodity, year`);
    expect(rows).toEqual([
      { region: "A", commodity: "c1", year: 2000, production: 100, imports: 5, exports: 30, consumption: 75, unit: "t", mirrored: false, negative: false },
      { region: "A", commodity: "c1", year: 2001, production: 90, imports: 0, exports: 10, consumption: 80, unit: "t", mirrored: false, negative: false },
      { region: "B", commodity: "c1", year: 2000, production: 20, imports: 30, exports: 60, consumption: -10, unit: "t", mirrored: false, negative: true },
    ]);
    const neg = await q(`SELECT keys, year, observed, status FROM '$OUT/audit.parquet' WHERE "check" = 'negative-consumption' AND row_kind = 'item'`);
    expect(neg).toHaveLength(1);
    expect(neg[0]!.observed).toBe(-10);
    const id = await q(`SELECT * FROM '$OUT/audit.parquet' WHERE "check" = 'identity'`);
    expect(id.every((x) => x.status === "pass")).toBe(true);
    close();
  });

  it("negative: zero clamps after the identity audit", async () => {
    const { q, close } = await runCase({
      "production.csv": "region,commodity,year,quantity\nB,c1,2000,20\n",
      "trade.csv": "reporter,partner,commodity,flow,year,quantity\nB,C,c1,export,2000,60\n",
    }, `  - id: ac\n    kind: apparent-consumption\n    production: production\n    trade: trade\n    negative: zero\n`);
    const rows = await q(`SELECT consumption FROM '$OUT/ac.parquet'`);
    expect(rows[0]!.consumption).toBe(0);
    const neg = await q(`SELECT observed, message FROM '$OUT/audit.parquet' WHERE "check" = 'negative-consumption' AND row_kind = 'item'`);
    expect(neg[0]!.observed).toBe(-40);
    expect(String(neg[0]!.message)).toContain("set to 0");
    close();
  });

  it("mirror fill: a reporter-year without reports takes its partners' reports of the opposite flow", async () => {
    // C reports nothing in 2000. A exports 7 to C, B imports 4 from C: so C imports 7 (from A) and exports 4 (to B).
    // C reports in 2001, so 2001 is not filled even though A reports exports to C.
    const { q, close } = await runCase({
      "production.csv": "region,commodity,year,quantity\nC,c1,2000,10\nC,c1,2001,10\n",
      "trade.csv": "reporter,partner,commodity,flow,year,quantity\nA,C,c1,export,2000,7\nB,C,c1,import,2000,4\nA,C,c1,export,2001,9\nC,B,c1,export,2001,1\n",
    }, `  - id: ac\n    kind: apparent-consumption\n    production: production\n    trade: trade\n    mirror_fill: true\n`);
    const rows = await q(`SELECT region, year, production, imports, exports, consumption, mirrored FROM '$OUT/ac.parquet' WHERE region = 'C' ORDER BY year`);
    expect(rows).toEqual([
      { region: "C", year: 2000, production: 10, imports: 7, exports: 4, consumption: 13, mirrored: true },
      { region: "C", year: 2001, production: 10, imports: 0, exports: 1, consumption: 9, mirrored: false },
    ]);
    const note = await q(`SELECT message FROM '$OUT/audit.parquet' WHERE "check" = 'mirror-fill'`);
    expect(String(note[0]!.message)).toMatch(/^2 of 6 reporter-years had no trade reports and were filled .* \(3 mirrored rows/);
    close();
  });

  it("without mirror fill the gap stays a gap", async () => {
    const { q, close } = await runCase({
      "production.csv": "region,commodity,year,quantity\nC,c1,2000,10\n",
      "trade.csv": "reporter,partner,commodity,flow,year,quantity\nA,C,c1,export,2000,7\n",
    }, `  - id: ac\n    kind: apparent-consumption\n    production: production\n    trade: trade\n`);
    const rows = await q(`SELECT consumption FROM '$OUT/ac.parquet' WHERE region = 'C'`);
    expect(rows[0]!.consumption).toBe(10);
    close();
  });

  it("trade asymmetry beyond the threshold is a warning naming both sides", async () => {
    const { q, close } = await runCase({
      "production.csv": "region,commodity,year,quantity\nA,c1,2000,10\n",
      "trade.csv": "reporter,partner,commodity,flow,year,quantity\nA,B,c1,import,2000,100\nB,A,c1,export,2000,60\nA,C,c1,import,2000,100\nC,A,c1,export,2000,90\n",
    }, `  - id: ac\n    kind: apparent-consumption\n    production: production\n    trade: trade\n`);
    const a = await q(`SELECT severity, message FROM '$OUT/audit.parquet' WHERE "check" = 'trade-asymmetry' AND row_kind = 'item'`);
    expect(a).toHaveLength(1);
    expect(a[0]!.severity).toBe("warning");
    expect(String(a[0]!.message)).toContain("imports reported by A from B (100) differ from the exports reported by B (60) by more than 25 %");
    close();
  });

  it("concordance: pieces × unit mass, factors and shares; mass conserved; keys chosen", async () => {
    const conc = `  conc:\n    path: conc.csv\n    unit: kg\n    columns: { commodity: text, product: text, material: text, factor: number, share: number, unit_mass: { type: quantity, nullable: true } }\n`;
    const { r, q, close } = await runCase({
      "production.csv": "region,commodity,year,quantity\nA,car,2000,2\nA,beam,2000,10\n",
      "trade.csv": "reporter,partner,commodity,flow,year,quantity,unit\nA,B,car,import,2000,1000,pieces\nA,B,beam,export,2000,4,t\n",
      // a car (1,500 kg) is 70 % steel and 30 % aluminium; a beam is 0.9 t steel per t.
      "conc.csv": "commodity,product,material,factor,share,unit_mass\ncar,vehicles,steel,1,0.7,1500\ncar,vehicles,aluminium,1,0.3,1500\nbeam,buildings,steel,0.9,1,\n",
    }, `  - id: ac\n    kind: apparent-consumption\n    production: production\n    trade: trade\n    concordance: conc\n    keys: [region, material]\n`,
    conc, BASIC_SOURCES.replace("    path: trade.csv\n    unit: t\n", "    path: trade.csv\n    unit_column: unit\n") + "      unit: text\n");
    expect(r.status).toBe("ok");
    const rows = await q(`SELECT material, production, imports, exports, consumption FROM '$OUT/ac.parquet' ORDER BY material`);
    // steel: production 2·0.7 + 10·0.9 = 10.4; imports 1000·1.5·0.7 = 1050; exports 4·0.9 = 3.6
    expect(rows[0]).toMatchObject({ material: "aluminium", production: 0.6, imports: 450, exports: 0 });
    expect(rows[1]!.material).toBe("steel");
    expect(rows[1]!.production).toBeCloseTo(10.4, 12);
    expect(rows[1]!.imports).toBeCloseTo(1050, 12);
    expect(rows[1]!.exports).toBeCloseTo(3.6, 12);
    const cons = await q(`SELECT "check", status FROM '$OUT/audit.parquet' WHERE "check" LIKE 'concordance-%' AND status = 'fail'`);
    expect(cons).toEqual([]);
    close();
  }, 60_000);

  it("shares that do not sum to 1 stop the run before any step (exit 3), naming the commodity", async () => {
    const dir = tmp();
    write(dir, {
      "p.yaml": `name: t\n${BASIC_SOURCES}  conc:\n    path: conc.csv\n    columns: { commodity: text, product: text, material: text, factor: number, share: number }\nsteps:\n  - id: ac\n    kind: apparent-consumption\n    production: production\n    trade: trade\n    concordance: conc\n`,
      "production.csv": "region,commodity,year,quantity\nA,c1,2000,2\n",
      "trade.csv": "reporter,partner,commodity,flow,year,quantity\nA,B,c1,import,2000,1\n",
      "conc.csv": "commodity,product,material,factor,share\nc1,p,steel,1,0.6\nc1,p,copper,1,0.3\n",
    });
    const r = await runPipeline(loadPipeline(path.join(dir, "p.yaml")), { out: path.join(dir, "o") });
    expect(r.status).toBe("failed");
    expect(r.exit_code).toBe(3);
    expect(r.error).toContain("every commodity's shares must sum to 1");
    expect(r.error).toMatch(/commodity c1 \(.*conc\.csv, line 2; .*conc\.csv, line 3\): shares sum to 0\.9/);
  });
});

describe("concordance step: mass in = mass out + unmapped", () => {
  it("per key and year, with the unmapped code listed", async () => {
    const conc = `  conc:\n    path: conc.csv\n    columns: { commodity: text, product: text, material: text, factor: number, share: number }\n`;
    const { q, close } = await runCase({
      "production.csv": "region,commodity,year,quantity\nA,c1,2000,10\nA,c2,2000,5\nA,c9,2000,3\n",
      "trade.csv": "reporter,partner,commodity,flow,year,quantity\nA,B,c1,import,2000,1\n",
      "conc.csv": "commodity,product,material,factor,share\nc1,p,steel,1,0.25\nc1,p,copper,1,0.75\nc2,q,steel,2,1\n",
    }, `  - id: mapped\n    kind: concordance\n    input: production\n    concordance: conc\n`, conc, "audit: { unmapped_max_share: 0.2 }\n" + BASIC_SOURCES);
    const rows = await q(`SELECT product, material, quantity FROM '$OUT/mapped.parquet' ORDER BY product, material`);
    expect(rows).toEqual([
      { product: "p", material: "copper", quantity: 7.5 },
      { product: "p", material: "steel", quantity: 2.5 },
      { product: "q", material: "steel", quantity: 10 },
    ]);
    const un = await q(`SELECT commodity, quantity FROM '$OUT/mapped_unmapped.parquet'`);
    expect(un).toEqual([{ commodity: "c9", quantity: 3 }]);
    const cons = await q(`SELECT status, observed, expected FROM '$OUT/audit.parquet' WHERE "check" = 'concordance-conservation:quantity'`);
    expect(cons.filter((x) => x.status === "fail")).toEqual([]);
    close();
  });
});
