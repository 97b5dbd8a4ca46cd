/**
 * Charts described as Vega-Lite specifications and rendered to SVG in Node by the `vega` and
 * `vega-lite` packages: no canvas, no browser. Every chart has a title and a description (its
 * text alternative, written into the SVG as aria-label).
 */
import * as vega from "vega";
import * as vl from "vega-lite";

export type VlSpec = vl.TopLevelSpec & { title: string; description: string };

/** One Vega-Lite specification → an SVG string (fonts: the reader's sans-serif). */
export async function renderSvg(spec: VlSpec): Promise<string> {
  const compiled = vl.compile(spec as vl.TopLevelSpec).spec;
  const view = new vega.View(vega.parse(compiled), { renderer: "none" });
  try {
    const svg = await view.toSVG();
    // The description as the chart's text alternative (aria-label on the root, which vega's SVG
    // renderer does not write), and a title element for readers that do not use aria-label.
    return svg.replace(/^<svg([^>]*)>/, (_m, attrs: string) =>
      `<svg${attrs} role="img" aria-label="${escapeXml(spec.description)}"><title>${escapeXml(spec.title)}</title>`);
  } finally {
    view.finalize();
  }
}

export function escapeXml(s: string): string {
  return s.replace(/&/g, "&amp;").replace(/</g, "&lt;").replace(/>/g, "&gt;").replace(/"/g, "&quot;");
}

/** Common look: years on x without thousands separators, sans-serif, a fixed width. */
export const BASE_CONFIG = {
  font: "sans-serif",
  axis: { labelFontSize: 11, titleFontSize: 12 },
  legend: { labelFontSize: 11, titleFontSize: 12 },
  title: { fontSize: 14, anchor: "start" as const },
  view: { stroke: null },
};

export interface YearRow {
  year: number;
  value: number;
  series: string;
  /** history or scenario (drawn dashed) */
  phase?: string;
  /** A Monte Carlo range of the value (drawn as a band), when the run has one. */
  lo?: number;
  hi?: number;
}

/** Lines over the years, one per series; a scenario phase dashed, and a rule where it starts. */
export function yearLines(o: { title: string; description: string; rows: YearRow[]; yTitle: string; seriesTitle: string; seam?: number; width?: number; height?: number }): VlSpec {
  const layers: unknown[] = [{
    mark: { type: "line", strokeWidth: 2 },
    encoding: {
      x: { field: "year", type: "quantitative", title: "year", axis: { format: "d", tickMinStep: 1 }, scale: { zero: false, nice: false } },
      y: { field: "value", type: "quantitative", title: o.yTitle, axis: { format: "~s" } },
      color: { field: "series", type: "nominal", title: o.seriesTitle },
      strokeDash: { field: "phase", type: "nominal", title: "", scale: { domain: ["history", "scenario"], range: [[1, 0], [6, 3]] } },
      detail: { field: "phase" },
    },
  }];
  if (o.seam !== undefined) {
    layers.push({ data: { values: [{ year: o.seam }] }, mark: { type: "rule", color: "#888", strokeDash: [2, 2] }, encoding: { x: { field: "year", type: "quantitative" } } });
  }
  return {
    $schema: "https://vega.github.io/schema/vega-lite/v6.json",
    title: o.title,
    description: o.description,
    width: o.width ?? 560,
    height: o.height ?? 260,
    data: { values: o.rows },
    layer: layers,
    config: BASE_CONFIG,
  } as unknown as VlSpec;
}

/** Small multiples: one panel per series with its own y scale (small series stay readable beside large ones). */
export function yearFacets(o: { title: string; description: string; rows: YearRow[]; yTitle: string; seriesTitle: string; seam?: number; columns?: number; width?: number; height?: number }): VlSpec {
  const layers: unknown[] = [{
    mark: { type: "line", strokeWidth: 2 },
    encoding: {
      x: { field: "year", type: "quantitative", title: "year", axis: { format: "d", tickMinStep: 1 }, scale: { zero: false, nice: false } },
      y: { field: "value", type: "quantitative", title: o.yTitle, axis: { format: "~s" }, scale: { zero: true } },
      strokeDash: { field: "phase", type: "nominal", title: "", scale: { domain: ["history", "scenario"], range: [[1, 0], [6, 3]] } },
      color: { field: "phase", type: "nominal", title: "", scale: { domain: ["history", "scenario"], range: ["#3b6ea8", "#c8642c"] } },
    },
  }];
  if (o.seam !== undefined) {
    layers.push({ transform: [{ calculate: String(o.seam), as: "seam" }, { aggregate: [{ op: "count", as: "n" }], groupby: ["seam"] }], mark: { type: "rule", color: "#888", strokeDash: [2, 2] }, encoding: { x: { field: "seam", type: "quantitative" } } });
  }
  return {
    $schema: "https://vega.github.io/schema/vega-lite/v6.json",
    title: o.title,
    description: o.description,
    data: { values: o.rows },
    facet: { field: "series", type: "nominal", title: o.seriesTitle, header: { labelFontSize: 12, labelFontWeight: "bold" } },
    columns: o.columns ?? 2,
    spec: { width: o.width ?? 260, height: o.height ?? 150, layer: layers },
    resolve: { scale: { y: "independent" } },
    config: BASE_CONFIG,
  } as unknown as VlSpec;
}
