/**
 * Monte Carlo uncertainty, statistical core (pure TypeScript, no DuckDB): seeded generator,
 * spreads, sampling designs, correlation across years, per-cell summaries and variance-based
 * sensitivity. Each file's header names its method and sources.
 */
export { Rng, splitMix64, withRandom } from "./random.js";
export { normQuantile, normCdf, normCdfFast, normSf, truncatedNormal } from "./normal.js";
export {
  type Marginal,
  type MarginalFamily,
  normalMarginal,
  truncatedNormalMarginal,
  lognormalMarginal,
  uniformMarginal,
  triangularMarginal,
  pointMarginal,
} from "./marginals.js";
export {
  Spread,
  NormalSpread,
  LognormalSpread,
  UniformSpread,
  TriangularSpread,
  SPREAD_FAMILIES,
  type SpreadForm,
  parseSpread,
  spreadForm,
  resolveSpread,
  factorMarginal,
} from "./spreads.js";
export { type SamplingDesign, SAMPLING_DESIGNS, permutation, uniformDesign, sampleInputs, sampleMarginal } from "./designs.js";
export { YearCorrelation, yearFactors } from "./correlation.js";
export { DEFAULT_PROBABILITIES, type CellStats, type DrawLayout, type SummaryOptions, summarizeCells } from "./summary.js";
export { type SobolDesign, type SobolOptions, type SobolResult, sobolDesign, sobolIndices } from "./sensitivity.js";
