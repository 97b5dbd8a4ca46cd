/**
 * Continuing a model from an earlier one. A `cohort-model` step that a later step continues
 * keeps its end state in memory (never published): per series, the inflow of every model
 * cohort, the initial stock by age, each cohort's own lifetime curve and material content.
 * The stock at the end of a year t1 is then, per series and age a = t1 − cohort, the amount
 * left, its curve and its content; the continuing step runs it as its initial stock, so each
 * cohort keeps its own survival and content. By linearity the model over [t0, T] equals the
 * model over [t0, t1] continued over [t1 + 1, T] (the splice law, DOMAIN.md), up to rounding.
 */
import { sigmaAt } from "../../cohort/discretise.js";
import type { Curve } from "../../cohort/models.js";

export interface CohortState {
  step: string;
  keys: string[];
  /** Key values per series (sid). */
  keyValues: string[][];
  y0: number;
  T: number;
  unit: string;
  /** Series → index into `groups`. */
  groupOf: Int32Array;
  groups: { curves: Curve[]; initCurves: Curve[] }[];
  /** n × T: the model cohorts' inflow (given, or solved by a stock-driven model). */
  inflow: Float64Array;
  /** n × A: the initial stock by age at the end of y0 − 1, or null. */
  initAmounts: Float64Array | null;
  A: number;
  materials: string[];
  /** (n·M) × T: content of the model cohorts, or null without content. */
  content: Float64Array | null;
  /** (n·M) × A: content of the initial stock's cohorts. */
  initContent: Float64Array | null;
  /** Series with content rows. */
  hasContent: Uint8Array;
}

/** The stock of an earlier model at the end of `year`, by age a = year − cohort. */
export interface CarriedStock {
  step: string;
  year: number;
  A: number;
  /** n × A amounts per series (the earlier model's series order). */
  amounts: Float64Array;
  /** The curve of series `sid`'s cohort of age a (undefined where nothing is left). */
  curve(sid: number, a: number): Curve | undefined;
  /** The earlier model's lifetime group of a series (series in one group share every curve). */
  groupOf(sid: number): number;
  materials: string[];
  /** Content of material index m in series sid's cohort of age a (0 without content). */
  content(sid: number, m: number, a: number): number;
  hasContent(sid: number): boolean;
  keyValues: string[][];
}

export class CarryStore {
  private readonly states = new Map<string, CohortState>();
  /** Steps some later step continues (set from the plan): only these keep their state. */
  constructor(readonly wanted: ReadonlySet<string> = new Set()) {}

  keep(st: CohortState): void {
    if (this.wanted.has(st.step)) this.states.set(st.step, st);
  }

  get(step: string): CohortState | undefined {
    return this.states.get(step);
  }
}

export function endState(st: CohortState, year: number): CarriedStock {
  const k1 = year - st.y0;
  if (k1 < 0 || k1 >= st.T) throw new RangeError(`year ${year} is outside ${st.y0}–${st.y0 + st.T - 1}`);
  const n = st.keyValues.length;
  const A = k1 + 1 + st.A;
  const T = st.T;
  const M = st.materials.length;
  const amounts = new Float64Array(n * A);
  for (let s = 0; s < n; s++) {
    const g = st.groups[st.groupOf[s]!]!;
    for (let c = 0; c <= k1; c++) {
      const I = st.inflow[s * T + c]!;
      if (I !== 0) amounts[s * A + (k1 - c)] = I * g.curves[c]!.sigma[k1 - c]!;
    }
    if (st.initAmounts) {
      for (let a = 0; a < st.A; a++) {
        const q = st.initAmounts[s * st.A + a]!;
        if (q === 0) continue;
        const lt = g.initCurves[a]!.lifetime;
        const sa = sigmaAt(lt, a);
        amounts[s * A + k1 + 1 + a] = sa > 0 ? (q * sigmaAt(lt, a + k1 + 1)) / sa : 0;
      }
    }
  }
  return {
    step: st.step,
    year,
    A,
    amounts,
    curve(sid, a) {
      const g = st.groups[st.groupOf[sid]!]!;
      return a <= k1 ? g.curves[k1 - a] : g.initCurves[a - k1 - 1];
    },
    groupOf: (sid) => st.groupOf[sid]!,
    materials: st.materials,
    content(sid, m, a) {
      if (!M) return 0;
      if (a <= k1) return st.content ? st.content[(sid * M + m) * T + (k1 - a)]! : 0;
      return st.initContent ? st.initContent[(sid * M + m) * st.A + (a - k1 - 1)]! : 0;
    },
    hasContent: (sid) => st.hasContent[sid] === 1,
    keyValues: st.keyValues,
  };
}
