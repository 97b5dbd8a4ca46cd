/**
 * A sharded run computes each cohort model on its shard's series only; the merge is equal to a
 * single run only if a series' result does not depend on the other series computed with it
 * (its lifetime group, its block of the kernels, the worker pool or not). The model is per series
 * by definition (DOMAIN.md, "The models": stock(t) = Σ_c I(c)·σ(t − c), outflow likewise, of the
 * series' own inflow; the stock-driven solve of its own stock path), so every bit must agree.
 */
import { afterAll, describe, expect, it } from "vitest";
import { makeLifetime, curveOf, CohortGroup, inflowDriven, stockDriven, composition, initialContribution } from "../../src/cohort/index.js";
import { kernelKind, setKernels, type KernelKind } from "../../src/cohort/kernels.js";
import { CohortPool, runTasks, taskFor } from "../../src/cohort/pool.js";

let seed = 20261202;
const rnd = () => ((seed = (seed * 1103515245 + 12345) % 2147483648) / 2147483648);

function pick(src: Float64Array, rows: number[], width: number): Float64Array {
  const out = new Float64Array(rows.length * width);
  rows.forEach((r, j) => out.set(src.subarray(r * width, r * width + width), j * width));
  return out;
}

/** Bits of series `rows` in the full result against the subset's result. */
function mismatches(full: Float64Array, part: Float64Array, rows: number[], width: number): number {
  let bad = 0;
  rows.forEach((r, j) => {
    for (let t = 0; t < width; t++) if (!Object.is(full[r * width + t], part[j * width + t])) bad++;
  });
  return bad;
}

const SUBSETS = [[0], [6], [22], [1, 2, 3], [0, 4, 8, 12, 16, 20], [19, 20, 21, 22], Array.from({ length: 11 }, (_, i) => i + 5)];
const original = kernelKind();
afterAll(() => setKernels(original));

describe("a series' cohort model does not depend on the other series computed with it", () => {
  const kinds: KernelKind[] = ["native", "wasm", "ts"];
  for (const k of kinds) {
    for (const T of [34, 200, 400]) {
      it(`${k} kernels, ${T} years: inflow-driven, stock-driven with a stock in place, composition`, () => {
        setKernels(k);
        const n = 23;
        const A = 40;
        const lt = makeLifetime({ distribution: "weibull", mean: 30, sd: 9 }, "test");
        const curve = curveOf(lt, T + A + 1);
        const g = new CohortGroup(T, Array(T).fill(curve));
        const initCurves = Array(A).fill(curve);
        const I = new Float64Array(n * T).map(() => rnd() * 1000);
        const byAge = new Float64Array(n * A).map(() => rnd() * 50);
        const content = new Float64Array(n * 2 * T).map(() => rnd());
        const init = (rows: number[]) => initialContribution({ byAge: pick(byAge, rows, A), total: new Float64Array(rows.length), A, curves: initCurves }, rows.length, T);
        const all = [...Array(n).keys()];
        const fullIn = inflowDriven(g, I, n, { indicators: true });
        const target = fullIn.stock.map((x) => x + 5000);
        const fullSt = stockDriven(g, target, n, { indicators: true, initial: init(all) });
        const fullComp = composition(g, I, n, content, 2, null);
        for (const rows of SUBSETS) {
          const m = rows.length;
          const rIn = inflowDriven(g, pick(I, rows, T), m, { indicators: true });
          const rSt = stockDriven(g, pick(target, rows, T), m, { indicators: true, initial: init(rows) });
          const rComp = composition(g, pick(I, rows, T), m, pick(content, rows, 2 * T), 2, null);
          for (const v of ["outflow", "stock", "stockChange", "meanAgeStock", "meanAgeOutflow"] as const) {
            expect(mismatches(fullIn[v]!, rIn[v]!, rows, T), `inflow-driven ${v}, series ${rows}`).toBe(0);
          }
          for (const v of ["inflow", "outflow", "stock", "meanAgeStock"] as const) {
            expect(mismatches(fullSt[v]!, rSt[v]!, rows, T), `stock-driven ${v}, series ${rows}`).toBe(0);
          }
          expect(mismatches(fullComp.stock, rComp.stock, rows, 2 * T), `composition, series ${rows}`).toBe(0);
        }
      });
    }
  }

  it("on the worker pool as in the main thread", async () => {
    setKernels(original);
    const T = 200;
    const n = 37;
    const lt = makeLifetime({ distribution: "lognormal", mean: 25, sd: 8 }, "test");
    const g = new CohortGroup(T, Array(T).fill(curveOf(lt, T + 1)));
    const I = new Float64Array(n * T).map(() => rnd() * 100);
    const main = inflowDriven(g, I, n, { indicators: true });
    const [pooled] = await runTasks([taskFor("inflow", g, I, n, { indicators: true })]);
    const part = inflowDriven(g, pick(I, [3, 4, 5], T), 3, { indicators: true });
    expect(mismatches(main.stock, pooled!.stock, [...Array(n).keys()], T)).toBe(0);
    expect(mismatches(pooled!.outflow, part.outflow, [3, 4, 5], T)).toBe(0);
    await CohortPool.closeShared();
  });
});
