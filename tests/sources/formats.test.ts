import { describe, expect, it } from "vitest";
import { mkdirSync } from "node:fs";
import path from "node:path";
import { loadPipeline } from "../../src/spec/load.js";
import { runPipeline } from "../../src/run/runner.js";
import { Session } from "../../src/engine/session.js";
import { tmp, write } from "../helpers.js";

describe("source formats", () => {
  it("hive-partitioned Parquet, header-less CSV with ';' and decimal comma, a filter, unit conversion, aggregate with members", async () => {
    const dir = tmp();
    const s = await Session.open();
    for (const [y, q] of [[2000, 10.5], [2001, 7.25], [2002, 0]] as const) {
      mkdirSync(path.join(dir, "hive", `year=${y}`), { recursive: true });
      await s.run(`COPY (SELECT 'A' AS region, 'c1' AS commodity, ${q} AS quantity) TO '${dir}/hive/year=${y}/p.parquet' (FORMAT parquet)`);
    }
    write(dir, {
      "trade.csv": "A;B;c1;export;2000;1,5\nB;A;c1;import;2000;1,5\n",
      "groups.csv": "member,group\nA,W\nB,W\n",
      "p.yaml": `name: f
variables: { folder: hive }
sources:
  production:
    path: \${folder}
    hive: true
    unit: kt
    columns: { region: { type: text, key: true }, commodity: { type: text, key: true }, year: { type: integer, key: true }, quantity: quantity }
    filter: "quantity > 0"
  trade:
    path: trade.csv
    unit: t
    csv: { delimiter: ";", decimal: ",", header: false }
    columns: { reporter: text, partner: text, commodity: text, flow: text, year: integer, quantity: quantity }
  groups:
    path: groups.csv
    columns: { member: text, group: text }
steps:
  - id: ac
    kind: apparent-consumption
    production: production
    trade: trade
  - id: world
    kind: aggregate
    input: ac
    groups: groups
    keep_members: true
`,
    });
    const r = await runPipeline(loadPipeline(path.join(dir, "p.yaml")), { out: path.join(dir, "o") });
    expect(r.status, r.error).toBe("ok");
    expect(r.sources[0]).toMatchObject({ name: "production", rows_read: 3, rows_filtered: 1, rows_loaded: 2 });
    const ac = await s.all(`SELECT region, year, production, imports, exports, consumption FROM '${dir}/o/ac.parquet' ORDER BY region, year`);
    expect(ac).toEqual([
      { region: "A", year: 2000, production: 10500, imports: 0, exports: 1.5, consumption: 10498.5 },
      { region: "A", year: 2001, production: 7250, imports: 0, exports: 0, consumption: 7250 },
      { region: "B", year: 2000, production: 0, imports: 1.5, exports: 0, consumption: 1.5 },
    ]);
    const w = await s.all(`SELECT region, year, consumption FROM '${dir}/o/world.parquet' WHERE region = 'W' ORDER BY year`);
    expect(w).toEqual([{ region: "W", year: 2000, consumption: 10500 }, { region: "W", year: 2001, consumption: 7250 }]);
    s.close();
  });
});
