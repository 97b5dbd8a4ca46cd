/**
 * The Monte Carlo job of one cohort model, as plain data (structured-cloneable, large arrays in
 * shared memory), so that worker threads can compute any chunk of it.
 *
 * A run is a full model run with its own lifetime parameters, content factors and input errors.
 * Each declared assumption (lifetime, content, input) keeps a table of sampled values indexed by
 * a draw index; run r takes its values at the indices idx[3r], idx[3r + 1], idx[3r + 2]. Plain
 * Monte Carlo uses index d for every assumption in run d; the variance-based sensitivity design
 * (Saltelli 2010) mixes the indices of two independent samples A and B.
 */
import type { LifetimeParams } from "../cohort/lifetime-spec.js";
import type { YearCorrelation } from "./correlation.js";
import type { Spread } from "./spreads.js";

/** Lifetime parameters that a spread may vary, in this order in `ltValues`. */
export const LT_PARAMS = ["mean", "sd", "shape", "scale"] as const;
export type LtParam = (typeof LT_PARAMS)[number];

export interface McGroup {
  /** Series of the group (indices into the n series). */
  sids: Int32Array;
  /** Lifetimes row of each model cohort (T). */
  cohortRow: Int32Array;
  /** Lifetimes row of each age of the stock in place (A), −1 for no stock of that age; null without a stock in place or when it is carried. */
  initRow: Int32Array | null;
  /**
   * The stock in place keeps its central survival (a continued model's carried cohorts): its
   * contribution per series of the group: stock0 (gn), stock and outflow (gn × T), and per
   * material (gn·M rows) the same, scaled by each run's content factor.
   */
  initFixed: { stock0: Float64Array; stock: Float64Array; outflow: Float64Array; matStock0: Float64Array | null; matStock: Float64Array | null; matOutflow: Float64Array | null } | null;
}

export interface McJob {
  step: string;
  mode: "inflow-driven" | "stock-driven";
  clamp: boolean;
  n: number;
  T: number;
  A: number;
  /** Length of the survival vectors (≥ T + A + 1). */
  curveLength: number;
  runs: number;
  /** runs × 3 draw indices: lifetime, content, input. */
  idx: Int32Array;
  /** Lifetimes rows as given (row index = position). */
  rows: (LifetimeParams & { label: string })[];
  /** Survival curves of `distribution: table` rows, by curve name. */
  tables: Record<string, { ages: number[]; survival: number[] }>;
  /** rows × 4 × ltDraws drawn parameter values (NaN: the row keeps its own), or null (no lifetime spread). */
  ltValues: Float64Array | null;
  ltDraws: number;
  groups: McGroup[];
  /** n × T central input (inflow, or stock for stock-driven). */
  values: Float64Array;
  /** n × A amounts of the stock in place by age (central), or null. */
  initAmounts: Float64Array | null;
  /** Materials: M, (n·M) × T content of the model cohorts, (n·M) × A of the cohorts in place. */
  M: number;
  content: Float64Array | null;
  initContent: Float64Array | null;
  /** M × ctDraws content factors, or null (no content spread). */
  ctFactors: Float64Array | null;
  ctDraws: number;
  /** Multiplicative error on the input per series and year, generated per (draw index, series) from the seed. */
  input: { spread: Spread; correlation: YearCorrelation; seed: number } | null;
  probabilities: number[];
  /** The product variables summarised (material stock and outflow follow stock and outflow). */
  variables: ("inflow" | "outflow" | "stock")[];
  /** Totals: for each level, the total cell of each series (n per level, −1: none); cells numbered across levels. */
  totals: { index: Int32Array; levels: number; cells: number };
  /** Sensitivity instead of summaries: N base rows, k assumptions (in the order of `assumptions`), bootstrap. */
  sobol: { base: number; assumptions: string[]; resamples: number; confidence: number; seed: number } | null;
}

/** Variables summarised per cell: the product's flows, then per material stock and outflow. */
export const PRODUCT_VARIABLES = ["inflow", "outflow", "stock"] as const;
export const MATERIAL_VARIABLES = ["stock", "outflow"] as const;

/** Statistics of one variable over a chunk's cells (series-major: [j·T + t]). */
export interface VarStats {
  mean: Float64Array;
  sd: Float64Array;
  quantiles: Float64Array[];
}

/** Sensitivity of one variable over a chunk's cells: [cell·k + i]. */
export interface VarSobol {
  first: Float64Array;
  total: Float64Array;
  firstLow: Float64Array;
  firstHigh: Float64Array;
  totalLow: Float64Array;
  totalHigh: Float64Array;
}

export interface McChunk {
  group: number;
  /** Series j0 ≤ j < j1 of the group. */
  j0: number;
  j1: number;
}

export interface McChunkResult {
  chunk: McChunk;
  /** Per product variable (PRODUCT_VARIABLES order), then per material m the MATERIAL_VARIABLES ([3 + 2m + v]). */
  stats: (VarStats | null)[];
  sobol: (VarSobol | null)[];
  /** Per-run contributions to the totals: [(cell·V + v)·runs·T + r·T + t], V = 3 + M (product flows, material stocks). */
  totals: Float64Array | null;
}
