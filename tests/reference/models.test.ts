/**
 * Cohort models against laws of the field and closed forms. Each check names its source.
 */
import { describe, expect, it } from "vitest";
import {
  CohortGroup, curveOf, inflowDriven, stockDriven, firstOrderDecay, initialContribution, makeLifetime, composition, byCohort,
  survivalVector, type Curve,
} from "../../src/cohort/index.js";

const rel = (a: number, b: number) => Math.abs(a - b) / Math.max(Math.abs(b), 1e-300);
const group = (lt: ReturnType<typeof makeLifetime>, T: number) => {
  const c = curveOf(lt, T + 1);
  return new CohortGroup(T, Array(T).fill(c));
};
function convolutionOnly(g: CohortGroup): CohortGroup {
  // The same group, with the first-order-decay shortcut disabled: the general convolution path.
  const h = Object.create(g) as CohortGroup;
  Object.defineProperty(h, "exponentialRate", { get: () => null });
  return h;
}

const FAMILIES: [string, Record<string, number | string>, number][] = [
  // [name, parameters, tolerance of Σσ against the true mean (midpoint rule, DOMAIN.md)]
  ["fixed", { distribution: "fixed", mean: 20 }, 1e-12],
  ["normal", { distribution: "normal", mean: 30, sd: 9 }, 1e-4], // its mass below age 0 (4e-4) leaves at once
  ["truncated-normal", { distribution: "truncated-normal", mean: 12, sd: 8 }, 1e-3],
  ["lognormal", { distribution: "lognormal", mean: 30, sd: 9 }, 1e-4],
  ["weibull", { distribution: "weibull", mean: 30, sd: 9 }, 1e-4],
  ["gamma", { distribution: "gamma", mean: 30, sd: 9 }, 1e-4],
  ["loglogistic", { distribution: "loglogistic", mean: 30, sd: 9 }, 1e-3],
  ["exponential mean 30", { distribution: "exponential", mean: 30 }, 1e-4],
  ["exponential mean 2", { distribution: "exponential", mean: 2 }, 0.011],
];

describe("Little's law in steady state, L = λW (J. D. C. Little, Operations Research 9(3), 1961)", () => {
  it.each(FAMILIES)("%s: stock = I·Σσ(a) exactly; ≈ I·mean within the stated tolerance", (_n, p, tol) => {
    const lt = makeLifetime(p as never, "t");
    const T = 1500;
    const g = group(lt, T);
    const I = new Float64Array(T).fill(250);
    const r = inflowDriven(g, I, 1);
    const sigmaSum = survivalVector(lt, T).reduce((a, b) => a + b, 0);
    expect(rel(r.stock[T - 1]!, 250 * sigmaSum)).toBeLessThan(1e-11);
    expect(rel(r.stock[T - 1]!, 250 * lt.mean)).toBeLessThan(tol);
    // In steady state the outflow equals the inflow (mass balance).
    expect(rel(r.outflow[T - 1]!, 250)).toBeLessThan(1e-9);
  });
});

describe("first-order decay: closed form of dS/dt = −kS + I (any ODE textbook), exact in discrete form", () => {
  const k = 1 / 8;
  it("no inflow: stock(t) = stock(0)·e^(−kt)", () => {
    const T = 60;
    const init = initialContribution({ byAge: null, total: new Float64Array([1000]), A: 400, curves: Array(400).fill(curveOf(makeLifetime({ distribution: "exponential", mean: 8 }, "t"), 500)) }, 1, T);
    const r = firstOrderDecay(new Float64Array(T), 1, T, k, { initial: init });
    for (let t = 0; t < T; t++) expect(rel(r.stock[t]!, 1000 * Math.exp(-k * (t + 1)))).toBeLessThan(1e-13);
  });
  it("constant inflow: stock → I·e^(−k/2)/(1 − e^(−k)) ≈ I/k", () => {
    const T = 800;
    const r = firstOrderDecay(new Float64Array(T).fill(40), 1, T, k);
    expect(rel(r.stock[T - 1]!, (40 * Math.exp(-k / 2)) / (1 - Math.exp(-k)))).toBeLessThan(1e-13);
    expect(rel(r.stock[T - 1]!, 40 / k)).toBeLessThan(2e-3);
  });
  it("the recurrence equals the general convolution path (stock, outflow, mean ages), with an initial stock", () => {
    const lt = makeLifetime({ distribution: "exponential", mean: 8 }, "t");
    const T = 90, n = 5;
    const g = group(lt, T);
    const I = new Float64Array(n * T).map((_, i) => 10 + ((i * 37) % 11));
    const init = initialContribution({ byAge: null, total: new Float64Array(n).fill(300), A: 600, curves: Array(600).fill(curveOf(lt, 700)) }, n, T);
    const a = inflowDriven(g, I, n, { indicators: true, initial: init });
    const b = inflowDriven(convolutionOnly(g), I, n, { indicators: true, initial: init });
    for (let i = 0; i < n * T; i++) {
      expect(rel(a.stock[i]!, b.stock[i]!)).toBeLessThan(1e-12);
      expect(rel(a.outflow[i]!, b.outflow[i]!)).toBeLessThan(1e-11);
      expect(rel(a.meanAgeStock![i]!, b.meanAgeStock![i]!)).toBeLessThan(1e-6);
      expect(rel(a.meanAgeOutflow![i]!, b.meanAgeOutflow![i]!)).toBeLessThan(1e-6);
    }
  });
});

describe("fixed lifetime moves a pulse out exactly L years later (DOMAIN.md midpoint rule)", () => {
  it.each([
    [10, 10],
    [10.5, 10], // halves round down
    [10.6, 11],
    [0, 0],
  ])("L = %s leaves at age %s", (L, age) => {
    const T = 30;
    const g = group(makeLifetime({ distribution: "fixed", mean: L }, "t"), T);
    const I = new Float64Array(T);
    I[3] = 500;
    const r = inflowDriven(g, I, 1);
    for (let t = 0; t < T; t++) expect(r.outflow[t]).toBe(t === 3 + age ? 500 : 0);
    expect(r.stock[3 + age]).toBe(0);
    if (age > 0) expect(r.stock[3 + age - 1]).toBe(500);
  });
});

function timeVarying(T: number): Curve[] {
  // Lifetimes change by cohort (time-varying): longer-lived cohorts later on.
  const a = curveOf(makeLifetime({ distribution: "weibull", mean: 12, sd: 4 }, "t"), T + 1);
  const b = curveOf(makeLifetime({ distribution: "lognormal", mean: 18, sd: 6 }, "t"), T + 1);
  return Array.from({ length: T }, (_, c) => (c < T / 2 ? a : b));
}

describe("mass balance and round trips (law of the field: stock(t) − stock(t−1) = inflow(t) − outflow(t))", () => {
  const T = 80, n = 9;
  const I = new Float64Array(n * T).map((_, i) => 50 + 30 * Math.sin(i / 7) + ((i * 13) % 5));
  const g = new CohortGroup(T, timeVarying(T));

  it("balance exact to 1e-9 relative, every series-year; stock = Σ_c I(c)·σ_c(t − c) by direct summation", () => {
    const r = inflowDriven(g, I, n, { indicators: true });
    for (let s = 0; s < n; s++) {
      let prev = 0;
      for (let t = 0; t < T; t++) {
        const i = s * T + t;
        const scale = Math.max(Math.abs(r.stock[i]!), Math.abs(I[i]!), Math.abs(r.outflow[i]!));
        expect(Math.abs(r.stock[i]! - prev - (I[i]! - r.outflow[i]!)) / scale).toBeLessThan(1e-9);
        let direct = 0;
        for (let c = 0; c <= t; c++) direct += I[s * T + c]! * g.curves[c]!.sigma[t - c]!;
        expect(rel(r.stock[i]!, direct)).toBeLessThan(1e-12);
        prev = r.stock[i]!;
      }
    }
  });

  it("inflow → stock → stock-driven recovers the inflow (no initial stock)", () => {
    const r = inflowDriven(g, I, n);
    const back = stockDriven(g, r.stock, n);
    for (let i = 0; i < n * T; i++) expect(rel(back.inflow[i]!, I[i]!)).toBeLessThan(1e-9);
    for (let i = 0; i < n * T; i++) expect(rel(back.outflow[i]!, r.outflow[i]!)).toBeLessThan(1e-8);
  });

  it("… and with an initial stock given by age", () => {
    const A = 30;
    const byAge = new Float64Array(n * A).map((_, i) => 20 + (i % A));
    const curves = Array(A).fill(g.curves[0]!);
    const init = initialContribution({ byAge, total: new Float64Array(n), A, curves }, n, T);
    const r = inflowDriven(g, I, n, { initial: init });
    const back = stockDriven(g, r.stock, n, { initial: init });
    for (let i = 0; i < n * T; i++) expect(rel(back.inflow[i]!, I[i]!)).toBeLessThan(1e-9);
    // The initial stock is the stock at the end of the year before the first model year.
    expect(rel(init.stock0[0]!, byAge.subarray(0, A).reduce((a, b) => a + b, 0))).toBeLessThan(1e-15);
  });

  it("… and with the steady-state initial structure (shares ∝ σ(a))", () => {
    const A = 200;
    const init = initialContribution({ byAge: null, total: new Float64Array(n).fill(900), A, curves: Array(A).fill(curveOf(makeLifetime({ distribution: "weibull", mean: 12, sd: 4 }, "t"), A + T + 2)) }, n, T);
    const r = inflowDriven(g, I, n, { initial: init });
    const back = stockDriven(g, r.stock, n, { initial: init });
    for (let i = 0; i < n * T; i++) expect(rel(back.inflow[i]!, I[i]!)).toBeLessThan(1e-9);
  });

  it("stock-driven with clamp sets negative inflow to 0 and reports the unmet stock change", () => {
    const lt = makeLifetime({ distribution: "fixed", mean: 30 }, "t");
    const gg = group(lt, 10);
    const Z = Float64Array.from([100, 100, 100, 40, 40, 40, 40, 40, 40, 40]);
    const keep = stockDriven(gg, Z, 1);
    expect(keep.inflow[3]).toBeCloseTo(-60, 12);
    const cl = stockDriven(gg, Z, 1, { clamp: true });
    expect(cl.inflow[3]).toBe(0);
    expect(cl.unmet![3]).toBeCloseTo(-60, 12);
    expect(cl.stock[3]).toBeCloseTo(100, 12);
  });
});

describe("composition by cohort and cohort-resolved results add up to the totals", () => {
  const T = 40, n = 3, M = 2;
  const g = new CohortGroup(T, timeVarying(T));
  const I = new Float64Array(n * T).map((_, i) => 5 + (i % 7));
  it("material stocks with content that changes by cohort; Σ materials = model run on the summed content", () => {
    const content = new Float64Array(n * M * T);
    for (let s = 0; s < n; s++) for (let c = 0; c < T; c++) {
      content[(s * M) * T + c] = c < 20 ? 0.7 : 0.6;
      content[(s * M + 1) * T + c] = c < 20 ? 0.1 : 0.2;
    }
    const r = composition(g, I, n, content, M);
    const total = new Float64Array(n * T);
    for (let s = 0; s < n; s++) for (let c = 0; c < T; c++) total[s * T + c] = content[(s * M) * T + c]! + content[(s * M + 1) * T + c]!;
    const sum = composition(g, I, n, total, 1);
    for (let s = 0; s < n; s++) for (let t = 0; t < T; t++) {
      const a = r.stock[(s * M) * T + t]! + r.stock[(s * M + 1) * T + t]!;
      expect(rel(a, sum.stock[s * T + t]!)).toBeLessThan(1e-12);
      // Direct: Σ_c I(c)·content(c)·σ_c(t − c) for material 0.
      let d = 0;
      for (let c = 0; c <= t; c++) d += I[s * T + c]! * content[(s * M) * T + c]! * g.curves[c]!.sigma[t - c]!;
      expect(rel(r.stock[(s * M) * T + t]!, d)).toBeLessThan(1e-12);
    }
  });
  it("cohort-resolved stock and outflow sum over cohorts to the totals", () => {
    const r = inflowDriven(g, I, n);
    for (const ch of byCohort(g, I, n)) {
      const st = new Float64Array(T);
      const ou = new Float64Array(T);
      for (let k = 0; k < ch.cohort.length; k++) {
        st[ch.year[k]!] += ch.stock[k]!;
        ou[ch.year[k]!] += ch.outflow[k]!;
      }
      for (let t = 0; t < T; t++) {
        expect(rel(st[t]!, r.stock[ch.s * T + t]!)).toBeLessThan(1e-12);
        expect(Math.abs(ou[t]! - r.outflow[ch.s * T + t]!)).toBeLessThan(1e-12 * r.stock[ch.s * T + t]! + 1e-15);
      }
    }
  });
});

describe("mean age of the stock (ages t − c + ½, DOMAIN.md)", () => {
  it("a single pulse has age t − c + ½ while it lasts", () => {
    const T = 20;
    const g = group(makeLifetime({ distribution: "weibull", mean: 8, sd: 3 }, "t"), T);
    const I = new Float64Array(T);
    I[2] = 10;
    const r = inflowDriven(g, I, 1, { indicators: true });
    for (let t = 2; t < T; t++) expect(r.meanAgeStock![t]).toBeCloseTo(t - 2 + 0.5, 10);
    expect(Number.isNaN(r.meanAgeStock![0]!)).toBe(true);
  });
});
