/** What every published manifest says about the method and its assumptions. */
export const METHOD_NOTE = {
  apparent_consumption: "production + imports − exports per keys and year (common practice); mirror fill, where enabled, uses partners' reports of the opposite flow for reporter-years without reports",
  concordance: "commodity mass (pieces × unit_mass) × factor × share per product and material; shares per commodity sum to 1",
  cohort_models: "discrete-time midpoint convention: items enter mid-year; σ(a) = S(a + ½) is the share of a cohort left at the end of the year it reaches age a; stock(t) = Σ I(c)·σ(t − c), outflow(t) = Σ I(c)·p(t − c)",
  stock_in_place: "an initial stock's cohorts (by age, or in steady state) and a continued model's cohorts keep their own lifetime and material content; a model continued from an earlier one at the end of a year equals the model run in one piece (the splice law)",
  scenario_paths: "yearly-path: linear, step, or the monotone piecewise cubic of Fritsch and Carlson (1980) between anchor years",
  sums: "SQL sums are exact at a resolution of 1 g (values rounded to whole grams, summed as integers), so re-runs give identical tables",
};

export const CAUTION =
  "These figures are model estimates, not measurements: apparent consumption inherits the gaps and asymmetries of trade statistics, and stock and outflow estimates depend on assumed lifetime distributions (rarely known to better than ±20 %). Publish them with the method and its assumptions, and under the publishing rules of the statistical office that releases them.";
