/**
 * Per-cell statistics: quantiles by Hyndman & Fan (1996) definition 7, computed by hand on a
 * small sample and compared exactly with a plain full-sort implementation on random data of
 * many shapes (ties, skew, outliers that force deep bucketing, infinities); mean and sd (n − 1).
 */
import { describe, expect, it } from "vitest";
import { Rng } from "../../src/uncertainty/random.js";
import { summarizeCells } from "../../src/uncertainty/summary.js";

const P = [0.05, 0.25, 0.5, 0.75, 0.95];

/** Definition 7 by a full sort: h = (n − 1)p, Q = x(⌊h⌋) + (h − ⌊h⌋)(x(⌊h⌋+1) − x(⌊h⌋)). */
function type7BySort(values: ArrayLike<number>, p: number): number {
  const x = Float64Array.from(values).sort();
  const h = (x.length - 1) * p;
  const j = Math.floor(h);
  const g = h - j;
  return g > 0 ? x[j]! + g * (x[j + 1]! - x[j]!) : x[j]!;
}

describe("quantiles, Hyndman & Fan definition 7", () => {
  it("match a hand computation on a small sample", () => {
    // x = 3 1 4 1 5 9 2 6, sorted 1 1 2 3 4 5 6 9 (0-based x(0) … x(7)), n − 1 = 7.
    // p = 0.05: h = 0.35 → x(0) + 0.35·(x(1) − x(0)) = 1 + 0.35·0 = 1
    // p = 0.25: h = 1.75 → x(1) + 0.75·(x(2) − x(1)) = 1 + 0.75·1 = 1.75
    // p = 0.5:  h = 3.5  → x(3) + 0.5·(x(4) − x(3)) = 3 + 0.5 = 3.5
    // p = 0.75: h = 5.25 → x(5) + 0.25·(x(6) − x(5)) = 5 + 0.25 = 5.25
    // p = 0.95: h = 6.65 → x(6) + 0.65·(x(7) − x(6)) = 6 + 0.65·3 = 7.95
    // p = 0 and 1: the minimum 1 and the maximum 9.
    // mean 31/8 = 3.875; Σx² = 173, Σ(x − mean)² = 173 − 8·3.875² = 52.875, sd = √(52.875/7).
    const x = Float64Array.from([3, 1, 4, 1, 5, 9, 2, 6]);
    const s = summarizeCells(x, 8, 1, { probabilities: [0.05, 0.25, 0.5, 0.75, 0.95, 0, 1] });
    const q = s.quantiles.map((a) => a[0]!);
    const hand = [1, 1.75, 3.5, 5.25, 7.95, 1, 9];
    hand.forEach((h, i) => expect(q[i]).toBeCloseTo(h, 13));
    expect(s.mean[0]).toBeCloseTo(3.875, 14);
    expect(s.sd[0]).toBeCloseTo(Math.sqrt(52.875 / 7), 14);
    expect(x).toEqual(Float64Array.from([3, 1, 4, 1, 5, 9, 2, 6])); // input untouched
  });

  it("equal a plain full-sort implementation exactly, on many shapes of data", () => {
    const rng = new Rng(2024);
    const shapes: Record<string, () => number> = {
      uniform: () => rng.uniform(),
      lognormal: () => Math.exp(3 * Math.sqrt(-2 * Math.log(rng.uniform())) * Math.cos(2 * Math.PI * rng.uniform())),
      ties: () => Math.floor(rng.uniform() * 5),
      outliers: () => (rng.uniform() < 0.01 ? 1e12 * rng.uniform() : rng.uniform() < 0.5 ? 1e-9 * rng.uniform() : rng.uniform()),
      negative: () => -Math.log(rng.uniform()) * (rng.uniform() < 0.5 ? -1 : 1),
      infinite: () => (rng.uniform() < 0.02 ? (rng.uniform() < 0.5 ? -Infinity : Infinity) : rng.uniform()),
      constant: () => 4.25,
    };
    const probabilities = [...P, 0, 0.001, 0.5, 0.999, 1, 1 / 3];
    for (const D of [1, 2, 3, 10, 64, 65, 129, 1000, 2500]) {
      for (const [name, gen] of Object.entries(shapes)) {
        const C = D > 500 ? 6 : 20;
        const v = Float64Array.from({ length: D * C }, gen);
        const s = summarizeCells(v, D, C, { probabilities });
        for (let c = 0; c < C; c++) {
          const cell = v.subarray(c * D, (c + 1) * D);
          probabilities.forEach((p, i) => {
            const want = type7BySort(cell, p);
            const got = s.quantiles[i]![c]!;
            if (!Object.is(got, want)) throw new Error(`${name}, D = ${D}, cell ${c}, p = ${p}: got ${got}, full sort gives ${want}`);
          });
        }
      }
    }
  });

  it("give the same results for draw-major input and for Float32 input", () => {
    const rng = new Rng(5);
    const D = 300;
    const C = 150;
    const cellMajor = Float64Array.from({ length: D * C }, () => Math.fround(rng.uniform() * 10 - 3));
    const drawMajor = new Float64Array(D * C);
    for (let c = 0; c < C; c++) for (let d = 0; d < D; d++) drawMajor[d * C + c] = cellMajor[c * D + d]!;
    const a = summarizeCells(cellMajor, D, C);
    const b = summarizeCells(drawMajor, D, C, { layout: "draw-major" });
    const f = summarizeCells(Float32Array.from(cellMajor), D, C);
    for (const other of [b, f]) {
      expect(other.mean).toEqual(a.mean);
      expect(other.sd).toEqual(a.sd);
      other.quantiles.forEach((q, i) => expect(q).toEqual(a.quantiles[i]));
    }
  });
});

describe("mean and sd", () => {
  it("agree with a direct two-pass computation (sd with the n − 1 denominator)", () => {
    const rng = new Rng(11);
    const D = 1000;
    const C = 50;
    // Large offset and small spread: a naive Σx² − n·mean² would lose most digits here.
    const v = Float64Array.from({ length: D * C }, () => 1e8 + rng.uniform());
    const s = summarizeCells(v, D, C);
    for (let c = 0; c < C; c++) {
      const cell = v.subarray(c * D, (c + 1) * D);
      let sum = 0;
      for (const x of cell) sum += x;
      const mean = sum / D;
      let ss = 0;
      for (const x of cell) ss += (x - mean) ** 2;
      expect(s.mean[c]! / mean).toBeCloseTo(1, 14);
      expect(s.sd[c]! / Math.sqrt(ss / (D - 1))).toBeCloseTo(1, 9);
    }
  });

  it("gives NaN for every statistic of a cell holding NaN, and sd NaN for one draw", () => {
    const v = Float64Array.from([1, 2, NaN, 4, 5, 6]);
    const s = summarizeCells(v, 3, 2);
    expect(s.mean[0]).toBeNaN();
    expect(s.sd[0]).toBeNaN();
    expect(s.quantiles[2]![0]).toBeNaN();
    expect(s.mean[1]).toBe(5);
    expect(s.quantiles[2]![1]).toBe(5);
    const one = summarizeCells(Float64Array.from([7]), 1, 1);
    expect(one.mean[0]).toBe(7);
    expect(one.sd[0]).toBeNaN();
    expect(one.quantiles.map((q) => q[0])).toEqual([7, 7, 7, 7, 7]);
  });
});

describe("output and checks", () => {
  it("writes into given arrays from an offset", () => {
    const into = { probabilities: P, mean: new Float64Array(5), sd: new Float64Array(5), quantiles: P.map(() => new Float64Array(5)) };
    summarizeCells(Float64Array.from([1, 2, 3, 10, 20, 30]), 3, 2, { into, offset: 3 });
    expect([...into.mean]).toEqual([0, 0, 0, 2, 20]);
    expect(into.quantiles[2]![4]).toBe(20);
  });

  it("names bad arguments", () => {
    expect(() => summarizeCells(new Float64Array(5), 3, 2)).toThrow(/values hold 5 numbers; 3 draws × 2 cells = 6 needed/);
    expect(() => summarizeCells(new Float64Array(6), 3, 2, { probabilities: [1.5] })).toThrow(/between 0 and 1 \(got 1\.5\)/);
    expect(() => summarizeCells(new Float64Array(6), 3, 2, { layout: "rows" as never })).toThrow(/unknown layout "rows"; accepted: cell-major, draw-major/);
  });
});
