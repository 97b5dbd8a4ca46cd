/**
 * Matching rows of a parameter table (lifetimes, content) to series and cohorts: an empty key
 * cell is a wildcard; a row applies when all its non-empty key cells match and the cohort lies
 * within [first_cohort, last_cohort]; the row with the most non-empty key cells wins; a tie or
 * no match is an error naming the series and cohort.
 */

export interface MatchRow {
  index: number;
  /** Non-empty key cells. */
  keys: Record<string, string>;
  first: number | null;
  last: number | null;
  specificity: number;
}

export function describeSeries(keyCols: readonly string[], values: readonly string[]): string {
  return keyCols.map((k, i) => `${k}=${values[i]}`).join(", ");
}

/** Rows whose key cells match the series, most specific first. */
export function candidates<R extends MatchRow>(rows: readonly R[], keyCols: readonly string[], values: readonly string[]): R[] {
  const out: R[] = [];
  for (const r of rows) {
    let ok = true;
    for (const [k, v] of Object.entries(r.keys)) {
      const i = keyCols.indexOf(k);
      if (values[i] !== v) {
        ok = false;
        break;
      }
    }
    if (ok) out.push(r);
  }
  return out.sort((a, b) => b.specificity - a.specificity || a.index - b.index);
}

/** The winning row for one cohort year, or an error message. */
export function pick<R extends MatchRow>(cands: readonly R[], cohort: number): R | string {
  let best: R | null = null;
  for (const r of cands) {
    if (best && r.specificity < best.specificity) break;
    if ((r.first !== null && cohort < r.first) || (r.last !== null && cohort > r.last)) continue;
    if (best) return `rows ${best.index + 1} and ${r.index + 1} match equally (${best.specificity} key cells each)`;
    best = r;
  }
  return best ?? "no row matches";
}
