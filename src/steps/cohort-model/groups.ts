/**
 * Lifetime groups: series whose every cohort (model cohorts and the cohorts of the stock in
 * place) has the same lifetime share one survival matrix, computed once. Series are grouped by
 * their candidate lifetimes rows, whether they hold a stock in place, and, when the model
 * continues an earlier one, by that model's group (whose curves their carried cohorts keep).
 */
import { DataError } from "../../errors.js";
import { ageHorizon, type Curve } from "../../cohort/index.js";
import { candidates, describeSeries, pick } from "../../ops/param-match.js";
import type { Inputs } from "./inputs.js";
import type { O } from "./options.js";
import type { CurveCache, ParamRow } from "./params.js";

export interface Group {
  sids: number[];
  /** Curve of each model cohort (index 0..T − 1). */
  curves: Curve[];
  /** Curve of each age of the stock in place (0..A − 1); empty without one. */
  initCurves: (Curve | undefined)[];
}

/** Key values of the series projected on a parameter table's key columns (candidates() looks them up by position). */
export function projectKeys(all: readonly string[], sub: readonly string[], values: readonly string[]): string[] {
  return sub.map((k) => values[all.indexOf(k)]!);
}

/** A per-series stock in place as amounts by age (n × A), or null. */
function hasStockInPlace(inp: Inputs, sid: number, A: number): boolean {
  if (inp.carried) return inp.carried.from[sid]! >= 0;
  if (!inp.init) return false;
  if (inp.init.total) return inp.init.total[sid]! !== 0;
  return inp.init.byAge!.subarray(sid * A, sid * A + A).some((x) => x !== 0);
}

export function buildGroups(o: O, inp: Inputs, lt: { rows: ParamRow[]; keyCols: string[] }, cache: CurveCache): { groups: Group[]; A: number } {
  const { n, T, y0, keyValues } = inp;
  const seriesName = (sid: number) => `series ${describeSeries(o.keys, keyValues[sid]!)}`;
  let A = inp.carried ? inp.carried.stock.A : inp.init ? inp.init.A : 0;
  const cands = keyValues.map((vals) => candidates(lt.rows, lt.keyCols, projectKeys(o.keys, lt.keyCols, vals)));
  // Steady-state ages: up to where σ of the lifetime of the cohort entering just before the first year is negligible.
  if (inp.init && !inp.init.byAge) {
    let maxA = 1;
    for (let sid = 0; sid < n; sid++) {
      if (!inp.init.total![sid]) continue;
      const p = pick(cands[sid]!, y0 - 1);
      if (typeof p === "string") throw new DataError(`step ${o.id}: ${seriesName(sid)}, cohort ${y0 - 1} (stock in place): ${p} in lifetimes table ${o.lifetimes}`);
      maxA = Math.max(maxA, ageHorizon(cache.of(p, seriesName(sid)).lifetime, 1e-12, 1000));
    }
    A = maxA;
  }
  cache.grow(T + A + 1);
  const groups = new Map<string, Group>();
  for (let sid = 0; sid < n; sid++) {
    const cand = cands[sid]!;
    const inPlace = hasStockInPlace(inp, sid, A);
    const carriedGroup = inp.carried && inPlace ? inp.carried.stock.groupOf(inp.carried.from[sid]!) : -1;
    const key = cand.map((c) => c.index).join(",") + (inPlace ? `|i${carriedGroup}` : "");
    let g = groups.get(key);
    if (!g) {
      const curves: Curve[] = [];
      for (let c = 0; c < T; c++) {
        const p = pick(cand, y0 + c);
        if (typeof p === "string") throw new DataError(`step ${o.id}: ${seriesName(sid)}, cohort ${y0 + c}: ${p} in lifetimes table ${o.lifetimes}`);
        curves.push(cache.of(p, seriesName(sid)));
      }
      const initCurves: (Curve | undefined)[] = [];
      if (inPlace && inp.carried) {
        for (let a = 0; a < A; a++) initCurves.push(inp.carried.stock.curve(inp.carried.from[sid]!, a));
      } else if (inPlace) {
        for (let a = 0; a < A; a++) {
          const p = pick(cand, y0 - 1 - a);
          if (typeof p === "string") throw new DataError(`step ${o.id}: ${seriesName(sid)}, cohort ${y0 - 1 - a} (stock in place, age ${a}): ${p} in lifetimes table ${o.lifetimes}`);
          initCurves.push(cache.of(p, seriesName(sid)));
        }
      }
      g = { sids: [], curves, initCurves };
      groups.set(key, g);
    }
    g.sids.push(sid);
  }
  return { groups: [...groups.values()], A };
}
