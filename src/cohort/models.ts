/**
 * Inflow-driven and stock-driven cohort models over batches of series that share one
 * lifetime assignment (a lifetime per cohort). Pure TypeScript, no I/O.
 *
 * Layout: every series × year quantity is a row-major Float64Array of n × T (series s, year
 * index t = year − firstYear). Cohort c is the cohort entering in year index c.
 */
import type { Lifetime } from "./distributions/types.js";
import { leavingAt, leavingVector, sigmaAt, survivalVector, ageHorizon, NEGLIGIBLE_SHARE } from "./discretise.js";
import { cohortProduct, inflowKernel, stockDrivenSolve, wasmKernels } from "./kernels.js";
import { balanceFromOutflow } from "./balance.js";

/** Survival and leaving shares of one lifetime, computed once and shared. */
export interface Curve {
  lifetime: Lifetime;
  sigma: Float64Array;
  leave: Float64Array;
}

export function curveOf(lt: Lifetime, n: number): Curve {
  return { lifetime: lt, sigma: survivalVector(lt, n), leave: leavingVector(lt, n) };
}

/** Initial stock at the end of the year before the first model year. */
export interface InitialStock {
  /** n × A: stock by whole-year age a = 0..A−1 per series; or null for the steady-state structure. */
  byAge: Float64Array | null;
  /** n: total per series (used for the steady-state structure; ignored when byAge is given). */
  total: Float64Array;
  A: number;
  /** The curve for the cohort of age a (cohort year t0 − 1 − a), a = 0..A−1 (undefined: no stock of that age). */
  curves: (Curve | undefined)[];
}

/** A batch of series sharing one lifetime per cohort (so one survival matrix). */
export class CohortGroup {
  /** σ_c(t − c) at [c·T + t], zero for c > t. */
  readonly S: Float64Array;
  /** p_c(t − c) at [c·T + t]. */
  readonly P: Float64Array;
  private SA?: Float64Array;
  private PA?: Float64Array;
  private St?: Float64Array;

  private rate: number | null | undefined;

  /** A group from its matrices (as sent to a worker thread). */
  static fromMatrices(T: number, S: Float64Array, P: Float64Array, rate: number | null, St?: Float64Array): CohortGroup {
    const g = Object.create(CohortGroup.prototype) as CohortGroup;
    Object.assign(g, { T, curves: [], S, P, rate, St });
    return g;
  }

  constructor(
    readonly T: number,
    /** The curve of each cohort c = 0..T−1 (entries may be shared objects). */
    readonly curves: readonly Curve[],
  ) {
    const S = new Float64Array(T * T);
    const P = new Float64Array(T * T);
    for (let c = 0; c < T; c++) {
      const cu = curves[c]!;
      for (let t = c; t < T; t++) {
        S[c * T + t] = cu.sigma[t - c]!;
        P[c * T + t] = cu.leave[t - c]!;
      }
    }
    this.S = S;
    this.P = P;
  }

  /** True when every cohort has the same exponential lifetime (first-order decay). */
  get exponentialRate(): number | null {
    if (this.rate !== undefined) return this.rate;
    const lt0 = this.curves[0]!.lifetime;
    if (lt0.family !== "exponential") return null;
    for (const c of this.curves) if (c.lifetime !== lt0 && (c.lifetime.family !== "exponential" || c.lifetime.mean !== lt0.mean)) return null;
    return 1 / lt0.mean;
  }

  /** Age-weighted matrices for the indicators: (t − c + ½)·σ and (t − c + ½)·p. */
  ageMatrices(): { SA: Float64Array; PA: Float64Array } {
    if (!this.SA || !this.PA) {
      const T = this.T;
      this.SA = new Float64Array(T * T);
      this.PA = new Float64Array(T * T);
      for (let c = 0; c < T; c++)
        for (let t = c; t < T; t++) {
          const age = t - c + 0.5;
          this.SA[c * T + t] = age * this.S[c * T + t]!;
          this.PA[c * T + t] = age * this.P[c * T + t]!;
        }
    }
    return { SA: this.SA, PA: this.PA };
  }

  transposedS(): Float64Array {
    if (!this.St) {
      const T = this.T;
      const St = new Float64Array(T * T);
      for (let c = 0; c < T; c++) for (let t = c; t < T; t++) St[t * T + c] = this.S[c * T + t]!;
      this.St = St;
    }
    return this.St;
  }
}

export interface ModelResult {
  inflow: Float64Array;
  outflow: Float64Array;
  stock: Float64Array;
  stockChange: Float64Array;
  meanAgeStock?: Float64Array;
  meanAgeOutflow?: Float64Array;
  /** Stock-driven only: target stock and (with clamp) the unmet stock change. */
  stockTarget?: Float64Array;
  unmet?: Float64Array;
  /** Items of the initial stock older than their distribution allows (left in the first year). */
  initialTooOld?: Float64Array;
}

/** What survives of the initial stock: stock, outflow and age sums per series and year. */
export interface InitialContribution {
  stock0: Float64Array; // n: stock at the end of t0 − 1
  stock: Float64Array; // n × T
  /** n × T: what leaves each year, q·p(a + t + 1)/σ(a) per age (each leaving share computed where it is accurate, not as a difference of stocks). */
  outflow: Float64Array;
  ageSum: Float64Array; // n × T: Σ age × stock
  outAgeSum: Float64Array; // n × T
  tooOld: Float64Array; // n
}

/** Per unit of each initial age a: the share left at the end of year index t, σ(a + t + 1)/σ(a) (0 when σ(a) = 0). */
function initialUnits(init: InitialStock, T: number, withLeaving = false): { unit: Float64Array; leave: Float64Array | null; live: Uint8Array; steady: Float64Array | null } {
  const { A, curves } = init;
  const unit = new Float64Array(A * T);
  const leave = withLeaving ? new Float64Array(A * T) : null;
  const live = new Uint8Array(A);
  for (let a = 0; a < A; a++) {
    const cu = curves[a];
    if (!cu) continue; // no stock of this age (a continued model's empty ages)
    const sa = sigmaAt(cu.lifetime, a);
    if (sa > 0) {
      live[a] = 1;
      for (let t = 0; t < T; t++) {
        const u = sigmaAt(cu.lifetime, a + t + 1) / sa;
        unit[a * T + t] = u < NEGLIGIBLE_SHARE ? 0 : u;
        if (leave) {
          const l = leavingAt(cu.lifetime, a + t + 1) / sa;
          leave[a * T + t] = Math.abs(l) < NEGLIGIBLE_SHARE ? 0 : l;
        }
      }
    }
  }
  let steady: Float64Array | null = null;
  if (!init.byAge) {
    steady = new Float64Array(A);
    let tot = 0;
    for (let a = 0; a < A; a++) tot += steady[a] = curves[a] ? sigmaAt(curves[a]!.lifetime, a) : 0;
    for (let a = 0; a < A; a++) steady[a]! /= tot;
  }
  return { unit, leave, live, steady };
}

/**
 * The initial stock's cohorts, one series at a time: for each age a with stock (oldest first),
 * rows for every model year (cohort index −1 − a), with the stock left and the outflow of that year.
 */
export function* initialCohorts(init: InitialStock, n: number, T: number): Generator<{ s: number; cohort: Int32Array; year: Int32Array; stock: Float64Array; outflow: Float64Array; inflow: Float64Array }> {
  const { A } = init;
  const { unit, live, steady } = initialUnits(init, T);
  for (let s = 0; s < n; s++) {
    const ages: number[] = [];
    for (let a = 0; a < A; a++) {
      const q = init.byAge ? init.byAge[s * A + a]! : steady![a]! * init.total[s]!;
      if (q !== 0) ages.push(a);
    }
    const rows = ages.length * T;
    const cohort = new Int32Array(rows), year = new Int32Array(rows);
    const stock = new Float64Array(rows), outflow = new Float64Array(rows), inflow = new Float64Array(rows);
    let k = 0;
    // Oldest age first: rows in (cohort, year) order, as the cohort-resolved table is sorted.
    for (const a of ages.reverse()) {
      const q = init.byAge ? init.byAge[s * A + a]! : steady![a]! * init.total[s]!;
      let prev = q;
      for (let t = 0; t < T; t++) {
        const v = live[a] ? q * unit[a * T + t]! : 0;
        cohort[k] = -1 - a;
        year[k] = t;
        stock[k] = v;
        outflow[k++] = prev - v;
        prev = v;
      }
    }
    yield { s, cohort, year, stock, outflow, inflow };
  }
}

/** The initial stock by age per series (n × A), from `byAge` or from the steady-state shares of `total`. */
export function initialAmounts(init: InitialStock, n: number): Float64Array {
  if (init.byAge) return init.byAge;
  const { A } = init;
  const { steady } = initialUnits({ ...init, byAge: null }, 0);
  const out = new Float64Array(n * A);
  for (let s = 0; s < n; s++) for (let a = 0; a < A; a++) out[s * A + a] = steady![a]! * init.total[s]!;
  return out;
}

export function initialContribution(init: InitialStock, n: number, T: number): InitialContribution {
  const { A } = init;
  const stock0 = new Float64Array(n);
  const stock = new Float64Array(n * T);
  const outflow = new Float64Array(n * T);
  const ageSum = new Float64Array(n * T);
  const outAgeSum = new Float64Array(n * T);
  const tooOld = new Float64Array(n);
  const { unit, leave, live, steady } = initialUnits(init, T, true);
  const shares = new Float64Array(A);
  for (let s = 0; s < n; s++) {
    if (init.byAge) for (let a = 0; a < A; a++) shares[a] = init.byAge[s * A + a]!;
    else for (let a = 0; a < A; a++) shares[a] = steady![a]! * init.total[s]!;
    let s0 = 0;
    for (let a = 0; a < A; a++) {
      const q = shares[a]!;
      if (q === 0) continue;
      s0 += q;
      if (!live[a]) {
        tooOld[s] += q;
        if (T > 0) {
          outflow[s * T] += q;
          outAgeSum[s * T] += q * (a + 1.5);
        }
        continue;
      }
      for (let t = 0; t < T; t++) {
        const v = q * unit[a * T + t]!;
        const o = q * leave![a * T + t]!;
        const age = a + t + 1.5;
        stock[s * T + t] += v;
        outflow[s * T + t] += o;
        ageSum[s * T + t] += v * age;
        outAgeSum[s * T + t] += o * age;
      }
    }
    stock0[s] = s0;
  }
  return { stock0, stock, outflow, ageSum, outAgeSum, tooOld };
}

/** Caller-provided result arrays (n × T each), e.g. buffers handed to a worker thread. */
export interface OutputBuffers {
  inflow?: Float64Array;
  outflow?: Float64Array;
  stock?: Float64Array;
  stockChange?: Float64Array;
}

export interface ModelOptions {
  indicators?: boolean;
  initial?: InitialContribution | null;
  out?: OutputBuffers;
}

/**
 * Inflow-driven: outflow(t) = Σ_c I(c)·p_c(t − c) (+ the initial stock's outflow); stock by the
 * balance stock(t) = stock(t − 1) + I(t) − outflow(t), which equals Σ_c I(c)·σ_c(t − c).
 */
export function inflowDriven(g: CohortGroup, inflow: Float64Array, n: number, opts: ModelOptions = {}): ModelResult {
  const T = g.T;
  const init = opts.initial ?? null;
  const rate = g.exponentialRate;
  if (rate !== null) return firstOrderDecay(inflow, n, T, rate, opts);
  if (wasmKernels()) {
    // One kernel call (native or WebAssembly): outflow, the initial stock's outflow, and the balance.
    const w = inflowKernel(inflow, n, T, g.P, init?.outflow ?? null, init?.stock0 ?? null, opts.out);
    const r: ModelResult = { inflow, ...w };
    if (opts.indicators) addIndicators(g, r, n, init);
    if (init) r.initialTooOld = init.tooOld;
    return r;
  }
  const outflow = opts.out?.outflow ?? new Float64Array(n * T);
  cohortProduct(inflow, n, T, g.P, outflow);
  if (init) for (let i = 0; i < n * T; i++) outflow[i] += init.outflow[i]!;
  const stock = opts.out?.stock ?? new Float64Array(n * T);
  const stockChange = opts.out?.stockChange ?? new Float64Array(n * T);
  balanceFromOutflow(inflow, outflow, null, init?.stock0 ?? null, n, T, stock, stockChange);
  const r: ModelResult = { inflow, outflow, stock, stockChange };
  if (opts.indicators) addIndicators(g, r, n, init);
  if (init) r.initialTooOld = init.tooOld;
  return r;
}

function addIndicators(g: CohortGroup, r: ModelResult, n: number, init: InitialContribution | null): void {
  const T = g.T;
  const { SA, PA } = g.ageMatrices();
  const as = new Float64Array(n * T);
  const ao = new Float64Array(n * T);
  cohortProduct(r.inflow, n, T, SA, as);
  cohortProduct(r.inflow, n, T, PA, ao);
  if (init) for (let i = 0; i < n * T; i++) {
    as[i] += init.ageSum[i]!;
    ao[i] += init.outAgeSum[i]!;
  }
  for (let i = 0; i < n * T; i++) {
    as[i] = r.stock[i]! > 0 ? as[i]! / r.stock[i]! : NaN;
    ao[i] = r.outflow[i]! > 0 ? ao[i]! / r.outflow[i]! : NaN;
  }
  r.meanAgeStock = as;
  r.meanAgeOutflow = ao;
}

/**
 * First-order decay (exponential lifetime, rate k = 1/mean), exact in the midpoint convention:
 *   stock(t) = e^(−k)·stock(t − 1) + e^(−k/2)·I(t)
 *   outflow(t) = (1 − e^(−k))·stock(t − 1) + (1 − e^(−k/2))·I(t)
 * O(years) per series for the model cohorts; an initial stock adds its own contribution
 * (computed with each initial cohort's own lifetime, which a continued model may not share).
 */
export function firstOrderDecay(inflow: Float64Array, n: number, T: number, k: number, opts: ModelOptions = {}): ModelResult {
  const init = opts.initial ?? null;
  const e1 = Math.exp(-k);
  const eh = Math.exp(-k / 2);
  const l1 = -Math.expm1(-k);
  const lh = -Math.expm1(-k / 2);
  const stock = new Float64Array(n * T);
  const outflow = new Float64Array(n * T);
  const stockChange = new Float64Array(n * T);
  const ind = opts.indicators;
  const mas = ind ? new Float64Array(n * T) : undefined;
  const mao = ind ? new Float64Array(n * T) : undefined;
  for (let s = 0; s < n; s++) {
    let prev = 0; // the model cohorts' stock
    let ageSum = 0;
    let prevTotal = init ? init.stock0[s]! : 0;
    for (let t = 0; t < T; t++) {
      const i = s * T + t;
      const I = inflow[i]!;
      const v = e1 * prev + eh * I;
      const o = l1 * prev + lh * I;
      const total = v + (init ? init.stock[i]! : 0);
      outflow[i] = o + (init ? init.outflow[i]! : 0);
      stock[i] = total;
      stockChange[i] = total - prevTotal;
      if (ind) {
        const oldAge = ageSum + prev; // survivors age by one year
        const newAge = ageSum = e1 * oldAge + eh * 0.5 * I;
        const outAge = l1 * oldAge + lh * 0.5 * I;
        const as = newAge + (init ? init.ageSum[i]! : 0);
        const ao = outAge + (init ? init.outAgeSum[i]! : 0);
        mas![i] = total > 0 ? as / total : NaN;
        mao![i] = outflow[i]! > 0 ? ao / outflow[i]! : NaN;
      }
      prev = v;
      prevTotal = total;
    }
  }
  const r: ModelResult = { inflow, outflow, stock, stockChange };
  if (ind) {
    r.meanAgeStock = mas;
    r.meanAgeOutflow = mao;
  }
  if (init) r.initialTooOld = init.tooOld;
  return r;
}

/**
 * Stock-driven: I(t) = [stock(t) − Σ_{c<t} I(c)·σ_c(t − c) − initial(t)] / σ_t(0), year by year.
 * Negative inflow is kept (and flagged by the caller) or, with clamp, set to 0 and the unmet
 * stock change reported. Outflow follows from the balance of the achieved stock.
 */
export function stockDriven(g: CohortGroup, target: Float64Array, n: number, opts: ModelOptions & { clamp?: boolean } = {}): ModelResult {
  const T = g.T;
  const init = opts.initial ?? null;
  for (let c = 0; c < T; c++) {
    if (!(g.S[c * T + c]! > 0)) throw new Error(`cohort ${c}: σ(0) = 0 (everything leaves in the year of entry), so no inflow can build a stock`);
  }
  const inflow = opts.out?.inflow ?? new Float64Array(n * T);
  const achieved = opts.out?.stock ?? new Float64Array(n * T);
  stockDrivenSolve(target, n, T, g.transposedS(), init ? init.stock : null, Boolean(opts.clamp), inflow, achieved);
  const outflow = opts.out?.outflow ?? new Float64Array(n * T);
  const stockChange = opts.out?.stockChange ?? new Float64Array(n * T);
  for (let s = 0; s < n; s++) {
    let prev = init ? init.stock0[s]! : 0;
    for (let t = 0; t < T; t++) {
      const i = s * T + t;
      outflow[i] = prev + inflow[i]! - achieved[i]!;
      stockChange[i] = achieved[i]! - prev;
      prev = achieved[i]!;
    }
  }
  const r: ModelResult = { inflow, outflow, stock: achieved, stockChange, stockTarget: target };
  if (opts.clamp) {
    const unmet = new Float64Array(n * T);
    for (let i = 0; i < n * T; i++) unmet[i] = target[i]! - achieved[i]!;
    r.unmet = unmet;
  }
  if (opts.indicators) addIndicators(g, r, n, init);
  if (init) r.initialTooOld = init.tooOld;
  return r;
}

/**
 * Material composition: material inflow I(c)·content_m(c), then the inflow-driven model, so
 * material stock and outflow follow each cohort's own content; no cohort matrix is built.
 * `content` is (n·M) × T: for series s and material m, row s·M + m holds content by cohort.
 */
export function composition(g: CohortGroup, inflow: Float64Array, n: number, content: Float64Array, M: number,
  initialMaterial: InitialContribution | null = null, out?: OutputBuffers): ModelResult {
  const T = g.T;
  const mi = out?.inflow ?? new Float64Array(n * M * T);
  for (let s = 0; s < n; s++)
    for (let m = 0; m < M; m++) {
      const row = (s * M + m) * T;
      for (let t = 0; t < T; t++) mi[row + t] = inflow[s * T + t]! * content[row + t]!;
    }
  return inflowDriven(g, mi, n * M, { initial: initialMaterial, out });
}

/**
 * Cohort-resolved stock and outflow, streamed: yields one series at a time (cohort-major rows
 * for t ≥ c), never holding more than one series' T × T block. The yielded arrays are reused
 * for the next series (a fresh 160 KB array per series cost more in page faults than the
 * arithmetic): copy what must outlive the iteration.
 */
export function* byCohort(g: CohortGroup, inflow: Float64Array, n: number): Generator<{ s: number; cohort: Int32Array; year: Int32Array; stock: Float64Array; outflow: Float64Array; inflow: Float64Array }> {
  const rows = byCohortRows(g.T);
  for (let s = 0; s < n; s++) {
    fillByCohort(g, inflow.subarray(s * g.T, (s + 1) * g.T), rows);
    yield { s, ...rows };
  }
}

/** Buffers for one series' cohort-resolved rows over T years (cohort-major, t ≥ c; cohort and year filled once). */
export function byCohortRows(T: number): { cohort: Int32Array; year: Int32Array; stock: Float64Array; outflow: Float64Array; inflow: Float64Array } {
  const rows = (T * (T + 1)) / 2;
  const cohort = new Int32Array(rows);
  const year = new Int32Array(rows);
  let k = 0;
  for (let c = 0; c < T; c++) for (let t = c; t < T; t++) {
    cohort[k] = c;
    year[k++] = t;
  }
  return { cohort, year, stock: new Float64Array(rows), outflow: new Float64Array(rows), inflow: new Float64Array(rows) };
}

/** One series' cohort-resolved stock, outflow and inflow (its T inflows `I`) into `rows` (from byCohortRows). */
export function fillByCohort(g: CohortGroup, I: Float64Array, rows: { stock: Float64Array; outflow: Float64Array; inflow: Float64Array }): void {
  const T = g.T;
  const { stock, outflow, inflow } = rows;
  let j = 0;
  for (let c = 0; c < T; c++) {
    const x = I[c]!;
    for (let t = c; t < T; t++) {
      stock[j] = x * g.S[c * T + t]!;
      outflow[j] = x * g.P[c * T + t]!;
      inflow[j++] = t === c ? x : 0;
    }
  }
}

export { ageHorizon };
