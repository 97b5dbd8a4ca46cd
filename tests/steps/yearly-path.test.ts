/**
 * Yearly paths through anchor values. The monotone cubic is checked against cases computed by
 * hand with the method of Fritsch and Carlson (SIAM J. Numer. Anal. 17(2), 238–246, 1980):
 * secants, three-point initial slopes, zero slopes at extrema and flat pieces, and the
 * α² + β² ≤ 9 limiter; the Hermite basis is written out in each case below.
 */
import { describe, expect, it } from "vitest";
import path from "node:path";
import { interpolate, monotoneSlopes } from "../../src/cohort/interpolate.js";
import { loadPipeline } from "../../src/spec/load.js";
import { runPipeline } from "../../src/run/runner.js";
import { Session } from "../../src/engine/session.js";
import { tmp, write } from "../helpers.js";

// Hermite basis at t = 0.5: h00 = 0.5, h10 = 0.125, h01 = 0.5, h11 = −0.125 (value = h00·y0 + h10·h·d0 + h01·y1 + h11·h·d1).
describe("monotone cubic (Fritsch–Carlson), hand-computed", () => {
  it("smooth rising data: three-point slopes, no limiter", () => {
    // Anchors (2020, 0), (2030, 10), (2040, 30): h = 10, 10; secants 1 and 2.
    // Slopes: ends = secants (1, 2); inside (10·1 + 10·2)/20 = 1.5. α, β = (1, 1.5) and (0.75, 1): inside the circle of radius 3.
    expect(Array.from(monotoneSlopes([2020, 2030, 2040], [0, 10, 30]))).toEqual([1, 1.5, 2]);
    const v = interpolate([2020, 2030, 2040], [0, 10, 30], [2020, 2025, 2030, 2035, 2040], "monotone-cubic");
    // 2025: 0.125·10·1 + 0.5·10 − 0.125·10·1.5 = 4.375; 2035: 0.5·10 + 0.125·10·1.5 + 0.5·30 − 0.125·10·2 = 19.375
    expect(Array.from(v)).toEqual([0, 4.375, 10, 19.375, 30]);
  });

  it("flat pieces stay flat: zero slopes where a secant is 0", () => {
    // (0, 0), (1, 0), (2, 1), (3, 1): secants 0, 1, 0, so every slope is 0; the middle piece is the
    // Hermite step 3t² − 2t³: 0.15625 at t = 0.25, 0.5 at t = 0.5. A natural spline would overshoot here.
    const v = interpolate([0, 1, 2, 3], [0, 0, 1, 1], [0.5, 1.25, 1.5, 2.5], "monotone-cubic");
    expect(Array.from(v)).toEqual([0, 0.15625, 0.5, 1]);
  });

  it("a steep rise: the limiter scales both slopes by τ = 3/√(α² + β²)", () => {
    // (0, 0), (1, 1), (2, 10): secants 1, 9; slopes 1, (1 + 9)/2 = 5, 9. On [0, 1]: α = 1, β = 5,
    // α² + β² = 26 > 9, τ = 3/√26: d0 = τ, d1 = 5τ. On [1, 2]: α = 5τ/9 ≈ 0.327, β = 1: unchanged.
    const tau = 3 / Math.sqrt(26);
    const d = monotoneSlopes([0, 1, 2], [0, 1, 10]);
    expect(d[0]).toBeCloseTo(tau, 15);
    expect(d[1]).toBeCloseTo(5 * tau, 15);
    expect(d[2]).toBe(9);
    const [y] = interpolate([0, 1, 2], [0, 1, 10], [0.5], "monotone-cubic");
    expect(y).toBeCloseTo(0.125 * tau + 0.5 - 0.125 * 5 * tau, 15);
  });

  it("keeps monotone data monotone, with a continuous slope at every anchor", () => {
    // Monotone data with very different steps (where unconstrained cubics overshoot).
    const xs = [2023, 2024, 2030, 2035, 2050];
    const ys = [1, 1.02, 1.02, 2.5, 2.6];
    const fine = Array.from({ length: 2700 }, (_, i) => 2023 + i / 100);
    const v = interpolate(xs, ys, fine, "monotone-cubic");
    for (let i = 1; i < v.length; i++) expect(v[i]!).toBeGreaterThanOrEqual(v[i - 1]! - 1e-12);
    // One-sided difference quotients at the interior anchors agree (C¹), to the step's order.
    for (const x of xs.slice(1, -1)) {
      const e = 1e-6;
      const [l0, l1, r1] = interpolate(xs, ys, [x - e, x, x + e], "monotone-cubic");
      expect(Math.abs((l1! - l0!) / e - (r1! - l1!) / e)).toBeLessThan(1e-4);
    }
  });

  it("linear data are reproduced exactly by every method but step", () => {
    const xs = [2000, 2010, 2025];
    const ys = [5, 25, 55]; // slope 2
    const q = Array.from({ length: 26 }, (_, i) => 2000 + i);
    for (const m of ["linear", "monotone-cubic"] as const) {
      const v = interpolate(xs, ys, q, m);
      q.forEach((x, i) => expect(v[i]).toBeCloseTo(5 + 2 * (x - 2000), 12));
    }
    expect(Array.from(interpolate(xs, ys, [2000, 2009, 2010, 2024], "step"))).toEqual([5, 5, 25, 25]);
  });
});

describe("yearly-path step", () => {
  const anchors = "region,year,per_capita\nA,2023,2\nA,2035,2.6\nA,2050,2.9\nB,2023,1\nB,2050,1\n";
  const pop = ["region,year,population", ...["A", "B"].flatMap((r) => Array.from({ length: 28 }, (_, i) => `${r},${2023 + i},${r === "A" ? 1000 + i : 500}`))].join("\n") + "\n";
  const pipe = (step: string) => `name: t
sources:
  anchors: { path: anchors.csv, columns: { region: {type: text, key: true}, year: {type: integer, key: true}, per_capita: number } }
  population: { path: population.csv, columns: { region: {type: text, key: true}, year: {type: integer, key: true}, population: number } }
steps:
  - { id: path, kind: yearly-path, input: anchors, ${step} }
`;
  async function run(step: string, files: Record<string, string> = {}) {
    const dir = tmp();
    write(dir, { "p.yaml": pipe(step), "anchors.csv": anchors, "population.csv": pop, ...files });
    const r = await runPipeline(loadPipeline(path.join(dir, "p.yaml")), { out: path.join(dir, "o") });
    return { r, dir };
  }

  it("interpolates per series, multiplies by the driver, converts the unit and renames", async () => {
    const { r, dir } = await run("years: { first: 2024, last: 2050 }, multiply: { table: population, column: population, keys: [region] }, as: { per_capita: stock }, unit: kt");
    expect(r.status, r.error).toBe("ok");
    const s = await Session.open();
    const rows = await s.all(`SELECT * FROM '${dir}/o/path.parquet' ORDER BY region, year`);
    s.close();
    expect(rows).toHaveLength(2 * 27);
    expect(Object.keys(rows[0]!)).toEqual(["region", "year", "stock", "unit"]);
    const ref = interpolate([2023, 2035, 2050], [2, 2.6, 2.9], [2024, 2035, 2040], "monotone-cubic");
    const at = (reg: string, y: number) => rows.find((x) => x.region === reg && x.year === y)!;
    // kt → t (× 1000), times the population of that year (A: 1000 + (year − 2023)).
    expect(at("A", 2024).stock).toBeCloseTo(ref[0]! * 1001 * 1000, 6);
    expect(at("A", 2035).stock).toBeCloseTo(2.6 * 1012 * 1000, 6);
    expect(at("A", 2040).stock).toBeCloseTo(ref[2]! * 1017 * 1000, 6);
    expect(at("B", 2040).stock).toBe(1 * 500 * 1000);
    expect(at("A", 2024).unit).toBe("t");
  });

  it("years beyond the anchors are an error unless held, naming the series", async () => {
    const bad = await run("years: { first: 2020, last: 2050 }");
    expect(bad.r.exit_code).toBe(3);
    expect(bad.r.error).toContain("series region=A has its first anchor in 2023, after the path's first year 2020; add an anchor or set before: hold");
    const held = await run("years: { first: 2020, last: 2055 }, before: hold, after: hold");
    expect(held.r.status, held.r.error).toBe("ok");
    const s = await Session.open();
    const rows = await s.all(`SELECT year, per_capita FROM '${held.dir}/o/path.parquet' WHERE region = 'A' AND year IN (2020, 2055) ORDER BY year`);
    s.close();
    expect(rows).toEqual([{ year: 2020, per_capita: 2 }, { year: 2055, per_capita: 2.9 }]);
  });

  it("two anchors for one series and year, and a driver that does not cover the path, are clear errors", async () => {
    const dup = await run("method: linear", { "anchors.csv": anchors + "A,2035,3\n" });
    expect(dup.r.exit_code).toBe(3);
    expect(dup.r.error).toMatch(/duplicate key \(region=A, year=2035\)/);
    const gap = await run("years: { first: 2023, last: 2050 }, multiply: { table: population, column: population, keys: [region] }", { "population.csv": pop.replace("B,2040,500\n", "") });
    expect(gap.r.exit_code).toBe(3);
    expect(gap.r.error).toContain("the driver population has no population for");
    expect(gap.r.error).toContain('"region":"B","year":2040');
  });
});
