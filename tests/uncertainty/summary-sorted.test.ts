/**
 * The sorted path of the per-cell summaries (summarizeDrawMajorSorted): its quantiles are the
 * Hyndman & Fan (1996) definition-7 quantiles (h = (n − 1)p, x(⌊h⌋) + (h − ⌊h⌋)(x(⌊h⌋+1) − x(⌊h⌋))
 * of the sorted sample), checked against a plain sort; cells that do not follow the draws'
 * order fall back to the general path and give the same numbers.
 */
import { describe, expect, it } from "vitest";
import { summarizeCells, summarizeDrawMajorSorted, type CellStats } from "../../src/uncertainty/summary.js";
import { Rng } from "../../src/uncertainty/random.js";

const probs = [0.05, 0.25, 0.5, 0.75, 0.95];

function type7(xs: number[], p: number): number {
  const s = [...xs].sort((a, b) => a - b);
  const h = (s.length - 1) * p;
  const j = Math.floor(h);
  return j + 1 < s.length ? s[j]! + (h - j) * (s[j + 1]! - s[j]!) : s[j]!;
}

function stats(C: number): CellStats {
  return { probabilities: probs, mean: new Float64Array(C), sd: new Float64Array(C), quantiles: probs.map(() => new Float64Array(C)) };
}

describe("summaries read off one ordering of the draws", () => {
  const R = 501;
  const C = 12;
  const rng = new Rng(5);
  it("cells driven by one quantity: every cell read off, quantiles = type 7 of the sorted sample", () => {
    // Cell c of draw d: a monotone function of one factor f_d (a stock growing with a lifetime, say).
    const f = Array.from({ length: R }, () => rng.uniform());
    const v = new Float64Array(R * C);
    for (let d = 0; d < R; d++) for (let c = 0; c < C; c++) v[d * C + c] = (c + 1) * Math.exp(f[d]!) + c * f[d]! ** 3;
    const out = stats(C);
    expect(summarizeDrawMajorSorted(v, R, C, probs, out)).toBe(C);
    for (let c = 0; c < C; c++) {
      const col = Array.from({ length: R }, (_, d) => v[d * C + c]!);
      probs.forEach((p, k) => expect(out.quantiles[k]![c]).toBe(type7(col, p)));
      const mean = col.reduce((a, b) => a + b, 0) / R;
      expect(out.mean[c]).toBeCloseTo(mean, 12);
      const sd = Math.sqrt(col.reduce((a, b) => a + (b - mean) ** 2, 0) / (R - 1));
      expect(out.sd[c]).toBeCloseTo(sd, 12);
    }
  });

  it("cells that rank the draws differently: the general path, the same numbers", () => {
    const v = new Float64Array(R * C).map(() => rng.uniform() * 100);
    const a = stats(C);
    const b = summarizeCells(v, R, C, { probabilities: probs, layout: "draw-major" });
    expect(summarizeDrawMajorSorted(v, R, C, probs, a)).toBeLessThan(C);
    for (let c = 0; c < C; c++) {
      probs.forEach((_, k) => expect(a.quantiles[k]![c]).toBe(b.quantiles[k]![c]));
      expect(a.mean[c]).toBeCloseTo(b.mean[c]!, 12);
    }
  });
});
