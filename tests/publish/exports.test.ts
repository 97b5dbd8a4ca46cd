/**
 * Files for statistical offices and readers, checked against their specifications and read
 * back by independent readers: SDMX-CSV 2.0 (SDMX Technical Working Group, SDMX-CSV format
 * specification v2.0.0, 2021) parsed with a plain CSV reader (csv-parse); Arrow IPC files read
 * with an independent Arrow implementation (@uwdata/flechette); the data dictionary and the
 * Parquet files' key-value metadata (Apache Parquet format: FileMetaData.key_value_metadata)
 * read with hyparquet.
 */
import { beforeAll, describe, expect, it } from "vitest";
import { readFileSync, writeFileSync } from "node:fs";
import path from "node:path";
import { parse } from "csv-parse/sync";
import { tableFromIPC } from "@uwdata/flechette";
import { parquetMetadata } from "hyparquet";
import { ROOT, cli, tmp } from "../helpers.js";
import { Session } from "../../src/engine/session.js";
import { OBS_STATUS_CODES } from "../../src/publish/sdmx.js";
import { readRunTable } from "../../src/publish/arrow.js";

const DEMO = path.join(ROOT, "pipelines", "demo.yaml");
let run = "";
let s: Session;

beforeAll(async () => {
  run = path.join(tmp("cairn-exports-"), "run");
  const r = cli(["run", DEMO, "--out", run, "--quiet"]);
  expect(r.code, r.stderr).toBe(0);
  s = await Session.open();
}, 120_000);

const csv = (f: string) => parse(readFileSync(path.join(run, f), "utf8"), { columns: true, skip_empty_lines: true }) as Record<string, string>[];
const codes = (f: string) => new Set((parse(readFileSync(path.join(ROOT, "data-samples", "demo", f), "utf8"), { columns: true }) as { code: string }[]).map((r) => r.code));

describe("SDMX-CSV 2.0 (SDMX-CSV format specification v2.0.0)", () => {
  it("header: STRUCTURE, STRUCTURE_ID, ACTION, the dimensions (TIME_PERIOD last), OBS_VALUE, then the attributes", () => {
    // Spec, "Header": the first three columns are STRUCTURE, STRUCTURE_ID and ACTION; then the
    // dimensions; then the measure(s); then the attributes.
    const header = readFileSync(path.join(run, "sdmx", "consumption.csv"), "utf8").split("\n")[0];
    expect(header).toBe("STRUCTURE,STRUCTURE_ID,ACTION,REF_AREA,PRODUCT,MATERIAL,TIME_PERIOD,OBS_VALUE,OBS_STATUS,UNIT_MEASURE,UNIT_MULT");
  });

  it("STRUCTURE is dataflow, STRUCTURE_ID is AGENCY:ID(VERSION), ACTION is I for a first release", () => {
    const rows = csv("sdmx/consumption.csv");
    expect(rows.length).toBeGreaterThan(1000);
    for (const r of rows) {
      // Spec: STRUCTURE is dataflow, datastructure or dataprovision; STRUCTURE_ID the structure's
      // id in the form AGENCY:ID(VERSION); ACTION I (information), A, R or D.
      expect(r.STRUCTURE).toBe("dataflow");
      expect(r.STRUCTURE_ID).toMatch(/^[A-Za-z][A-Za-z0-9_-]*:[A-Za-z][A-Za-z0-9_-]*\(\d+(\.\d+){0,2}\)$/);
      expect(r.STRUCTURE_ID).toBe("DEMO_OFFICE:DF_APPARENT_CONSUMPTION(1.0)");
      expect(r.ACTION).toBe("I");
    }
  });

  it("every code used is in its code list; OBS_STATUS from CL_OBS_STATUS; UNIT_MULT a power of ten", () => {
    const regions = codes("office_region_codes.csv");
    const materials = codes("office_material_codes.csv");
    for (const f of ["sdmx/consumption.csv", "sdmx/stocks_materials.csv", "sdmx/stocks_materials_scenario.csv"]) {
      for (const r of csv(f)) {
        expect(regions.has(r.REF_AREA!), r.REF_AREA).toBe(true);
        expect(materials.has(r.MATERIAL!), r.MATERIAL).toBe(true);
        // SDMX cross-domain code list CL_OBS_STATUS (DOMAIN.md lists its codes).
        expect((OBS_STATUS_CODES as readonly string[]).includes(r.OBS_STATUS!)).toBe(true);
        // CL_UNIT_MULT: the exponent of a power of ten.
        expect(r.UNIT_MULT).toBe("3");
        expect(r.UNIT_MEASURE).toBe("T");
        expect(r.TIME_PERIOD).toMatch(/^\d{4}$/);
      }
    }
    // The documented rules: reported A, mirrored (estimated) E, modelled E, years after the newest data year F.
    const cons = csv("sdmx/consumption.csv");
    expect(new Set(cons.map((r) => r.OBS_STATUS))).toEqual(new Set(["A", "E"]));
    expect(new Set(csv("sdmx/stocks_materials.csv").map((r) => r.OBS_STATUS))).toEqual(new Set(["E"]));
    expect(new Set(csv("sdmx/stocks_materials_scenario.csv").map((r) => r.OBS_STATUS))).toEqual(new Set(["F"]));
  });

  it("parses with a plain CSV reader to the Parquet numbers (× 10^UNIT_MULT), printed as the shortest decimal at 1 g", async () => {
    const rows = csv("sdmx/consumption.csv");
    const region = new Map([...(parse(readFileSync(path.join(ROOT, "data-samples", "demo", "office_region_codes.csv"), "utf8"), { columns: true }) as { value: string; code: string }[])].map((r) => [r.code, r.value]));
    const mat = new Map([...(parse(readFileSync(path.join(ROOT, "data-samples", "demo", "office_material_codes.csv"), "utf8"), { columns: true }) as { value: string; code: string }[])].map((r) => [r.code, r.value]));
    const pq = await s.all(`SELECT region, product, material, year, consumption FROM '${run}/consumption.parquet'`);
    const want = new Map(pq.map((r) => [`${r.region}|${r.product}|${r.material}|${r.year}`, Number(r.consumption)]));
    expect(rows.length).toBe(pq.filter((r) => r.consumption !== null).length);
    for (const r of rows) {
      const v = want.get(`${region.get(r.REF_AREA!)}|${r.PRODUCT}|${mat.get(r.MATERIAL!)}|${r.TIME_PERIOD}`)!;
      // At most 9 decimals (1 g in kt) and no trailing zero: the shortest exact decimal at the resolution.
      expect(r.OBS_VALUE).toMatch(/^-?\d+(\.\d{0,8}[1-9])?$/);
      expect(Math.abs(Number(r.OBS_VALUE) * 1000 - v)).toBeLessThanOrEqual(0.5e-6 + Math.abs(v) * 1e-15);
    }
  });

  it("ranges: OBS_LOWER and OBS_UPPER are the uncertainty table's 5 % and 95 % quantiles, scaled like OBS_VALUE", async () => {
    const rows = csv("sdmx/stocks_materials.csv");
    const header = readFileSync(path.join(run, "sdmx", "stocks_materials.csv"), "utf8").split("\n")[0]!.split(",");
    expect(header.slice(-2)).toEqual(["OBS_LOWER", "OBS_UPPER"]);
    const region = new Map([...(parse(readFileSync(path.join(ROOT, "data-samples", "demo", "office_region_codes.csv"), "utf8"), { columns: true }) as { value: string; code: string }[])].map((r) => [r.code, r.value]));
    const mat = new Map([...(parse(readFileSync(path.join(ROOT, "data-samples", "demo", "office_material_codes.csv"), "utf8"), { columns: true }) as { value: string; code: string }[])].map((r) => [r.code, r.value]));
    const u = await s.all(`SELECT region, product, material, year, q05, q95 FROM '${run}/stocks_uncertainty.parquet' WHERE total_over IS NULL AND variable = 'stock' AND material IS NOT NULL`);
    const want = new Map(u.map((r) => [`${r.region}|${r.product}|${r.material}|${r.year}`, [Number(r.q05), Number(r.q95)]]));
    expect(rows.length).toBe(want.size);
    for (const r of rows) {
      const [lo, hi] = want.get(`${region.get(r.REF_AREA!)}|${r.PRODUCT}|${mat.get(r.MATERIAL!)}|${r.TIME_PERIOD}`)!;
      expect(Math.abs(Number(r.OBS_LOWER) * 1000 - lo!)).toBeLessThanOrEqual(0.5e-6 + Math.abs(lo!) * 1e-15);
      expect(Math.abs(Number(r.OBS_UPPER) * 1000 - hi!)).toBeLessThanOrEqual(0.5e-6 + Math.abs(hi!) * 1e-15);
    }
  });

  it("a release that replaces an earlier one says R; a provisional one marks its values P", () => {
    const dir = tmp("cairn-sdmx-");
    expect(cli(["run", DEMO, "--release", "r1", "--catalog", path.join(dir, "c"), "--quiet"]).code).toBe(0);
    const r2 = cli(["run", DEMO, "--release", "r2", "--catalog", path.join(dir, "c"), "--provisional", "--quiet"]);
    expect(r2.code, r2.stderr).toBe(0);
    const rows = parse(readFileSync(path.join(dir, "c", "r2", "sdmx", "consumption.csv"), "utf8"), { columns: true }) as Record<string, string>[];
    expect(new Set(rows.map((r) => r.ACTION))).toEqual(new Set(["R"]));
    expect(new Set(rows.map((r) => r.OBS_STATUS))).toEqual(new Set(["P"]));
  }, 120_000);

  it("a missing value is kept as an empty OBS_VALUE with OBS_STATUS O, never dropped", () => {
    // SDMX-CSV v2.0.0: an empty field is an absent value; CL_OBS_STATUS O = missing value (from memory).
    const dir = tmp("cairn-sdmx-missing-");
    writeFileSync(path.join(dir, "m.csv"), "region,year,value\nA,2020,1.5\nA,2021,\nB,2020,2\n");
    writeFileSync(path.join(dir, "p.yaml"), [
      "name: missing", "base_unit: t", "sources:", "  m:", "    path: m.csv", "    unit: t", "    columns:",
      "      region: { type: text, key: true }", "      year: { type: integer, key: true }", "      value: { type: quantity, nullable: true }",
      "steps:", "  - id: t", "    kind: sql", "    inputs: [m]", "    query: SELECT region, year, value FROM m", "    columns: [region, year, value]", "    keys: [region, year]",
      "exports:", "  - { format: sdmx-csv, table: t, agency: X, id: DF, dimensions: { REF_AREA: region }, measure: value, unit_measure: T }",
    ].join("\n") + "\n");
    const r = cli(["run", path.join(dir, "p.yaml"), "--out", path.join(dir, "run"), "--quiet"]);
    expect(r.code, r.stderr).toBe(0);
    const rows = parse(readFileSync(path.join(dir, "run", "sdmx", "t.csv"), "utf8"), { columns: true }) as Record<string, string>[];
    expect(rows.map((x) => [x.REF_AREA, x.TIME_PERIOD, x.OBS_VALUE, x.OBS_STATUS])).toEqual([["A", "2020", "1.5", "A"], ["A", "2021", "", "O"], ["B", "2020", "2", "A"]]);
  }, 120_000);
});

describe("Arrow IPC files, read by an independent Arrow reader", () => {
  it("stocks.arrow holds the same rows and values as stocks.parquet, key columns dictionary-encoded", async () => {
    const t = tableFromIPC(readFileSync(path.join(run, "stocks.arrow")));
    const pq = await s.all(`SELECT * FROM '${run}/stocks.parquet'`);
    expect(t.numRows).toBe(pq.length);
    const names = t.schema.fields.map((f) => f.name);
    expect(names).toEqual(Object.keys(pq[0]!));
    // Arrow columnar format: a dictionary-encoded field carries a dictionary (type id 1 is Utf8 values with int32 indices).
    expect(t.schema.fields.find((f) => f.name === "region")!.type.typeId).toBe(-1); // Dictionary
    const rows = t.toArray();
    pq.forEach((r, i) => {
      for (const k of names) {
        const a = (rows[i] as Record<string, unknown>)[k];
        const b = r[k];
        if (b === null) expect(a ?? null).toBeNull();
        else if (typeof b === "number") expect(Number(a)).toBe(b);
        else expect(String(a)).toBe(String(b));
      }
    });
  });

  it("the library reads a run's table as an Arrow Table (from its Arrow file, or from Parquet)", async () => {
    const a = await readRunTable(run, "stocks");
    const b = await readRunTable(run, "consumption");
    expect(a.numRows).toBe(680);
    expect(b.numRows).toBe(Number(await s.scalar(`SELECT count(*) FROM '${run}/consumption.parquet'`)));
    expect(b.schema.fields.map((f) => f.name)).toContain("consumption");
  });
});

describe("the data dictionary", () => {
  it("lists every published table and column with type, unit and meaning, and key codes with labels", () => {
    const d = JSON.parse(readFileSync(path.join(run, "dictionary.json"), "utf8"));
    const m = JSON.parse(readFileSync(path.join(run, "manifest.json"), "utf8"));
    const published = new Set(m.outputs.filter((o: { step?: string; role?: string }) => o.step && !["export"].includes(o.role ?? "")).map((o: { table: string }) => o.table));
    expect(new Set(d.tables.map((t: { name: string }) => t.name))).toEqual(published);
    const stocks = d.tables.find((t: { name: string }) => t.name === "stocks");
    const col = (n: string) => stocks.columns.find((c: { name: string }) => c.name === n);
    expect(col("stock")).toMatchObject({ type: "DOUBLE", unit: "t" });
    expect(col("mean_age_stock").unit).toBe("years");
    expect(col("region").codes).toContainEqual({ code: "ALD", label: "Aldmark" });
    for (const t of d.tables) for (const c of t.columns) expect(c.description.length).toBeGreaterThan(3);
    const text = cli(["describe", run, "--table", "stocks"]);
    expect(text.code).toBe(0);
    expect(text.stdout).toContain("- stock DOUBLE [t]: stock in use at the end of the year");
  });

  it("each Parquet file carries its units and column meanings in its key-value metadata", async () => {
    const buf = readFileSync(path.join(run, "stocks.parquet"));
    const meta = parquetMetadata(buf.buffer.slice(buf.byteOffset, buf.byteOffset + buf.byteLength));
    const kv = Object.fromEntries((meta.key_value_metadata ?? []).map((x: { key: string; value?: string }) => [x.key, x.value]));
    expect(kv["cairn.table"]).toBe("stocks");
    expect(kv["cairn.unit"]).toBe("t");
    const cols = JSON.parse(kv["cairn.columns"]!);
    expect(cols.find((c: { name: string }) => c.name === "outflow")).toMatchObject({ unit: "t", description: "outflow leaving the stock in the year (end of life)" });
    expect(kv["cairn.caution"]).toMatch(/estimates/);
  });
});
