/**
 * The report's chart specifications (Vega-Lite), built from small aggregated rows. Every chart has
 * a title and a description (its text alternative); years on x without thousands separators;
 * a scenario that continues a history is dashed, with a dotted rule at the seam.
 */
import { BASE_CONFIG, type VlSpec, type YearRow } from "./render.js";

const SCHEMA = "https://vega.github.io/schema/vega-lite/v6.json";
/** Mark-level ARIA off (the whole chart carries one label): smaller SVGs. */
const CONFIG = { ...BASE_CONFIG, aria: false };
const DASHES = [[1, 0], [6, 3], [2, 2], [8, 3, 2, 3], [12, 4]];
const PHASE_COLOURS = ["#3b6ea8", "#c8642c", "#6a9a3a", "#8e5ba8", "#a83b5b"];

/** The phases of the rows (history first), dashed after the first. */
function phaseScale(rows: { phase?: string }[], colours = false): { domain: string[]; range: unknown[] } {
  const domain = [...new Set(rows.map((r) => r.phase).filter((p): p is string => Boolean(p)))].sort((a, b) => (a === "history" ? -1 : b === "history" ? 1 : a.localeCompare(b)));
  const range = colours ? domain.map((_, i) => PHASE_COLOURS[i % PHASE_COLOURS.length]) : domain.map((_, i) => DASHES[i % DASHES.length]);
  return { domain, range };
}
const YEAR_AXIS = { format: "d", tickMinStep: 1, labelOverlap: true };

export interface FlowRow extends YearRow {
  variable: string;
}

export interface AgeRow {
  age: number;
  value: number;
  series: string;
}

/** Values scaled to a readable unit: t → thousand t, million t, … chosen by the largest magnitude. */
export function scaled<T extends { value: number }>(rows: T[], unit: string): { rows: T[]; unit: string } {
  const max = rows.reduce((m, r) => Math.max(m, Math.abs(r.value)), 0);
  const [f, word] = max >= 1e10 ? [1e9, "billion "] : max >= 1e7 ? [1e6, "million "] : max >= 1e4 ? [1e3, "thousand "] : [1, ""];
  const sc = (r: T): T => {
    const x = r as T & { lo?: number; hi?: number };
    return { ...r, value: r.value / f, ...(x.lo !== undefined ? { lo: x.lo / f } : {}), ...(x.hi !== undefined ? { hi: x.hi / f } : {}) };
  };
  return { rows: f === 1 ? rows : rows.map(sc), unit: `${word}${unit}`.trim() };
}

/** Keep the `max` largest series (by the sum of |value|); the others are summed into one "other (n)" series. */
export function lumpSeries<T extends { series: string; value: number; year?: number; age?: number; phase?: string }>(rows: T[], max = 10): T[] {
  const totals = new Map<string, number>();
  for (const r of rows) totals.set(r.series, (totals.get(r.series) ?? 0) + Math.abs(r.value));
  if (totals.size <= max) return rows;
  const keep = new Set([...totals.entries()].sort((a, b) => b[1] - a[1]).slice(0, max - 1).map(([s]) => s));
  const other = `other (${totals.size - keep.size})`;
  const sums = new Map<string, T>();
  const out: T[] = [];
  for (const r of rows) {
    if (keep.has(r.series)) {
      out.push(r);
      continue;
    }
    const k = JSON.stringify([r.year, r.age, r.phase, (r as { variable?: string }).variable]);
    const s = sums.get(k);
    if (s) s.value += r.value;
    else {
      // A range of a sum is not the sum of ranges: lumped series carry none.
      const { lo: _lo, hi: _hi, ...rest } = r as T & { lo?: number; hi?: number };
      void _lo;
      void _hi;
      const n = { ...rest, series: other } as T;
      sums.set(k, n);
      out.push(n);
    }
  }
  return out;
}

/** Panels per row: all in one row up to four, else three. */
function columnsFor(rows: { series: string }[]): number {
  const n = new Set(rows.map((r) => r.series)).size;
  return n <= 4 ? Math.max(1, n) : 3;
}

function top(title: string, description: string): { $schema: string; title: string; description: string; config: typeof CONFIG } {
  return { $schema: SCHEMA, title, description, config: CONFIG };
}

function seamLayer(seam: number | undefined, faceted: boolean): unknown[] {
  if (seam === undefined) return [];
  const mark = { type: "rule", color: "#777", strokeDash: [2, 2] };
  // Inside a facet a layer cannot bring its own data: one row per panel from the panel's data.
  return faceted
    ? [{ transform: [{ calculate: String(seam), as: "seam" }, { aggregate: [{ op: "count", as: "n" }], groupby: ["seam"] }], mark, encoding: { x: { field: "seam", type: "quantitative" } } }]
    : [{ data: { values: [{ seam }] }, mark, encoding: { x: { field: "seam", type: "quantitative" } } }];
}

const hasScenario = (rows: { phase?: string }[]) => rows.some((r) => r.phase && r.phase !== "history");

/** Lines over the years, one per series (colour); history solid and scenario dashed when there is one. */
export function lines(o: { title: string; description: string; rows: YearRow[]; yTitle: string; seriesTitle: string; seam?: number; width?: number; height?: number }): VlSpec {
  const enc: Record<string, unknown> = {
    x: { field: "year", type: "quantitative", title: "year", axis: YEAR_AXIS, scale: { zero: false, nice: false } },
    y: { field: "value", type: "quantitative", title: o.yTitle, axis: { format: ",~r" } },
    color: { field: "series", type: "nominal", title: o.seriesTitle },
  };
  if (hasScenario(o.rows)) Object.assign(enc, { strokeDash: { field: "phase", type: "nominal", title: "", scale: phaseScale(o.rows) }, detail: { field: "phase" } });
  return {
    ...top(o.title, o.description),
    width: o.width ?? 600,
    height: o.height ?? 260,
    data: { values: o.rows },
    layer: [{ mark: { type: "line", strokeWidth: 1.8 }, encoding: enc }, ...seamLayer(o.seam, false)],
  } as unknown as VlSpec;
}

/** Flows (rows of `variable`: inflow, outflow) in one panel per series with its own y scale; variables in colour, scenario dashed. */
export function flowPanels(o: { title: string; description: string; rows: FlowRow[]; yTitle: string; seriesTitle: string; seam?: number; columns?: number }): VlSpec {
  const enc: Record<string, unknown> = {
    x: { field: "year", type: "quantitative", title: "year", axis: YEAR_AXIS, scale: { zero: false, nice: false } },
    y: { field: "value", type: "quantitative", title: o.yTitle, axis: { format: ",~r" }, scale: { zero: true } },
    color: { field: "variable", type: "nominal", title: "", scale: { domain: ["inflow", "outflow"], range: ["#2e7d32", "#b3261e"] } },
    detail: { field: "phase" },
  };
  if (hasScenario(o.rows)) Object.assign(enc, { strokeDash: { field: "phase", type: "nominal", title: "", scale: phaseScale(o.rows) } });
  return {
    ...top(o.title, o.description),
    data: { values: o.rows },
    facet: { field: "series", type: "nominal", title: null, header: { labelFontSize: 12, labelFontWeight: "bold" } },
    columns: o.columns ?? columnsFor(o.rows),
    spec: { width: 190, height: 120, layer: [{ mark: { type: "line", strokeWidth: 1.6 }, encoding: enc }, ...seamLayer(o.seam, true)] },
    resolve: { scale: { y: "independent" } },
    config: CONFIG,
  } as unknown as VlSpec;
}

/** Small multiples, one panel per series with its own y scale; history solid, scenario dashed. */
export function panels(o: { title: string; description: string; rows: YearRow[]; yTitle: string; seriesTitle: string; seam?: number; columns?: number }): VlSpec {
  const enc: Record<string, unknown> = {
    x: { field: "year", type: "quantitative", title: "year", axis: YEAR_AXIS, scale: { zero: false, nice: false } },
    y: { field: "value", type: "quantitative", title: o.yTitle, axis: { format: ",~r" }, scale: { zero: true } },
  };
  if (hasScenario(o.rows)) {
    Object.assign(enc, {
      strokeDash: { field: "phase", type: "nominal", title: "", scale: phaseScale(o.rows) },
      color: { field: "phase", type: "nominal", title: "", scale: phaseScale(o.rows, true) },
    });
  }
  return {
    ...top(o.title, o.description),
    data: { values: o.rows },
    facet: { field: "series", type: "nominal", title: null, header: { labelFontSize: 12, labelFontWeight: "bold" } },
    columns: o.columns ?? columnsFor(o.rows),
    spec: {
      width: 190, height: 120,
      layer: [
        // The Monte Carlo range (lo–hi) as a band behind the line, where the rows carry one.
        ...(o.rows.some((r) => r.lo !== undefined)
          ? [{ mark: { type: "area", opacity: 0.2, color: "#3b6ea8" }, encoding: { x: enc.x, y: { field: "lo", type: "quantitative", title: o.yTitle }, y2: { field: "hi" } } }]
          : []),
        { mark: { type: "line", strokeWidth: 1.6, color: "#3b6ea8" }, encoding: enc }, ...seamLayer(o.seam, true)],
    },
    resolve: { scale: { y: "independent" } },
    config: CONFIG,
  } as unknown as VlSpec;
}

/** The stock of one year by age (year − cohort), one panel per series with its own scales; single years of age as bars. */
export function agePanels(o: { title: string; description: string; rows: AgeRow[]; yTitle: string; columns?: number }): VlSpec {
  return {
    ...top(o.title, o.description),
    data: { values: o.rows },
    facet: { field: "series", type: "nominal", title: null, header: { labelFontSize: 12, labelFontWeight: "bold" } },
    columns: o.columns ?? 2,
    spec: {
      width: 290,
      height: 130,
      mark: { type: "area", interpolate: "step-after", color: "#3b6ea8", opacity: 0.85, line: { color: "#2a5286", strokeWidth: 1 } },
      encoding: {
        x: { field: "age", type: "quantitative", title: "age (year − cohort)", axis: { format: "d", tickMinStep: 1 }, scale: { nice: false, zero: true } },
        y: { field: "value", type: "quantitative", title: o.yTitle, axis: { format: ",~r" } },
      },
    },
    resolve: { scale: { x: "independent", y: "independent" } },
    config: CONFIG,
  } as unknown as VlSpec;
}
