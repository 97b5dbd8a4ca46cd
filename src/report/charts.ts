/**
 * The report's charts, as specifications with their (aggregated) data: apparent consumption by
 * region and by material; per chain of cohort models (a history and the scenarios that continue
 * it) stock, inflow and outflow by product, stock by material, and the age structure of the
 * stock in the newest year (or, without a by-cohort table, the mean age of the stock).
 */
import { ident, lit } from "../engine/sql.js";
import type { ManifestStep, RunReader } from "./data.js";
import { chartRows } from "./lump.js";
import type { VlSpec, YearRow } from "./render.js";
import { agePanels, flowPanels, lines, lumpSeries, panels, scaled, type AgeRow, type FlowRow } from "./specs.js";
import { fmtNum } from "./html.js";

export type ChartItem = { spec: VlSpec } | { note: string };

export interface ChartGroup {
  heading: string;
  intro?: string;
  items: ChartItem[];
}

interface Col {
  column_name: string;
}

async function columns(r: RunReader, table: string): Promise<Set<string>> {
  return new Set(((await r.all(`DESCRIBE SELECT * FROM ${r.table(table)}`)) as unknown as Col[]).map((c) => c.column_name));
}

/** The unit of a table's figures (its `unit` column when it has one value, else the pipeline's base unit). */
async function unitOf(r: RunReader, table: string, cols: Set<string>): Promise<{ unit: string; mixed: boolean }> {
  const base = r.manifest.pipeline.base_unit ?? "";
  if (!cols.has("unit")) return { unit: base, mixed: false };
  const u = await r.distinctText(table, "unit");
  return u.length === 1 ? { unit: u[0]!, mixed: false } : { unit: u.length ? "mixed units" : base, mixed: u.length > 1 };
}

/** The key a chart splits a table by: `product` when it has one, else the first key that is not region or year. */
function seriesKey(keys: string[], cols: Set<string>, prefer: string[]): string | null {
  for (const p of prefer) if (cols.has(p)) return p;
  return keys.find((k) => k !== "year" && k !== "region" && k !== "cohort" && cols.has(k)) ?? null;
}

const seriesExpr = (by: string | null, mixed: boolean) =>
  `coalesce(${by ? `CAST(${ident(by)} AS VARCHAR)` : "'total'"}${mixed ? ` || ' (' || CAST(unit AS VARCHAR) || ')'` : ""}, 'null')`;

/**
 * Whether a table holds one row per series and `dims` (its keys are among them, besides the series
 * key): its sums over the other keys are its values, and need no grouping (a cohort model's tables).
 */
const onePerRow = (keys: string[], by: string | null, dims: string[]): boolean =>
  keys.length > 0 && dims.every((d) => keys.includes(d)) && keys.every((k) => k === by || dims.includes(k));

/** One sentence on lines over the years: span, series and the newest year's values. */
function describe(what: string, rows: { series: string; year: number; value: number; phase?: string }[], unit: string): string {
  if (!rows.length) return `${what}: no data.`;
  const years = rows.map((x) => x.year);
  const y0 = Math.min(...years);
  const y1 = Math.max(...years);
  const last = new Map<string, number>();
  for (const x of rows) if (x.year === y1) last.set(x.series, (last.get(x.series) ?? 0) + x.value);
  const series = [...new Set(rows.map((x) => x.series))];
  const newest = [...last.entries()].sort((a, b) => Math.abs(b[1]) - Math.abs(a[1])).slice(0, 6).map(([s, v]) => `${s} ${fmtNum(v)}`).join(", ");
  return `${what}, ${y0}–${y1}, in ${unit}; ${series.length} series (${series.slice(0, 12).join(", ")}${series.length > 12 ? ", …" : ""}). In ${y1}: ${newest}.`;
}

async function consumptionCharts(r: RunReader, step: ManifestStep): Promise<ChartGroup[]> {
  const groups: ChartGroup[] = [];
  for (const out of step.outputs.filter((o) => o.role === "main" && r.has(o.name))) {
    const cols = await columns(r, out.name);
    if (!cols.has("consumption") || !cols.has("year")) continue;
    const { unit, mixed } = await unitOf(r, out.name, cols);
    const items: ChartItem[] = [];
    for (const by of ["region", "material"]) {
      if (!cols.has(by)) {
        items.push({ note: `${out.name} has no ${by} column: no chart by ${by}.` });
        continue;
      }
      // The sums by series and year, lumped in DuckDB when there are more than 10 series.
      const raw = (await chartRows(r, `SELECT ${seriesExpr(by, mixed)} AS series, CAST(year AS INTEGER) AS year, CAST(sum(consumption) AS DOUBLE) AS value
        FROM ${r.table(out.name)} GROUP BY ALL`, { values: ["value"], order: ["series", "year"], max: 10 })).rows as unknown as YearRow[];
      const s = scaled(lumpSeries(raw, 10), unit);
      const others = ["region", "product", "material"].filter((k) => k !== by && cols.has(k));
      items.push({
        spec: lines({
          title: `Apparent consumption by ${by} (${out.name}, ${s.unit})`,
          description: describe(`Apparent consumption (production + imports − exports) by ${by}, summed over ${others.join(" and ") || "the other keys"}`, s.rows, s.unit),
          rows: s.rows, yTitle: `consumption (${s.unit})`, seriesTitle: by,
        }),
      });
    }
    groups.push({ heading: `Apparent consumption: ${out.name}`, intro: `Step ${step.id}. Sums over the table's other keys; negative values (exports beyond production and imports) are kept as published.`, items });
  }
  return groups;
}

/** Cohort-model steps grouped into chains: a history and every model that continues it (directly or not). */
export function cohortChains(steps: ManifestStep[]): ManifestStep[][] {
  const cohort = steps.filter((s) => s.kind === "cohort-model");
  const byId = new Map(cohort.map((s) => [s.id, s]));
  const root = (s: ManifestStep): string => {
    const seen = new Set<string>();
    let cur = s;
    while (cur.continues && byId.has(cur.continues) && !seen.has(cur.id)) {
      seen.add(cur.id);
      cur = byId.get(cur.continues)!;
    }
    return cur.id;
  };
  const chains = new Map<string, ManifestStep[]>();
  for (const s of cohort) {
    const k = root(s);
    chains.set(k, [...(chains.get(k) ?? []), s]);
  }
  return [...chains.values()];
}

const mainOf = (s: ManifestStep) => s.outputs.find((o) => o.role === "main")?.name ?? s.id;

/** Phase names: "history" for a model that continues none; "scenario" (or "scenario: id" when several). */
function phaseNames(chain: ManifestStep[]): Map<string, string> {
  const scen = chain.filter((s) => s.continues);
  return new Map(chain.map((s) => [s.id, !s.continues ? "history" : scen.length > 1 ? `scenario: ${s.id}` : "scenario"]));
}

/** The scenario's lines start from the value of the year before it (the continued model's last year), so history and scenario join. */
function join<T extends YearRow>(rows: T[], chain: ManifestStep[], phase: Map<string, string>, key: (r: T) => string): T[] {
  const out = [...rows];
  for (const s of chain.filter((x) => x.continues)) {
    const from = phase.get(s.continues!);
    const hist = rows.filter((x) => x.phase === from);
    const start = Math.min(...rows.filter((x) => x.phase === phase.get(s.id)).map((x) => x.year));
    if (!hist.length || !Number.isFinite(start)) continue;
    const lastYear = Math.max(...hist.filter((x) => x.year < start).map((x) => x.year));
    for (const h of hist.filter((x) => x.year === lastYear)) out.push({ ...h, phase: phase.get(s.id)! });
  }
  return out.sort((a, b) => key(a).localeCompare(key(b)) || a.year - b.year);
}

function seamOf(rows: YearRow[], chain: ManifestStep[], phase: Map<string, string>): number | undefined {
  const s = chain.find((x) => x.continues);
  if (!s) return undefined;
  const ys = rows.filter((x) => x.phase === phase.get(s.id)).map((x) => x.year);
  return ys.length ? Math.min(...ys) - 0.5 : undefined;
}

async function chainCharts(r: RunReader, chain: ManifestStep[]): Promise<ChartGroup> {
  const phase = phaseNames(chain);
  const items: ChartItem[] = [];
  const names = chain.map((s) => s.id).join(" → ");
  let unit = r.manifest.pipeline.base_unit ?? "";
  const links = chain.filter((s) => s.continues).map((s) => ({ from: phase.get(s.continues!), to: phase.get(s.id)! }));
  // Stock, inflow and outflow by product (each model's sums in DuckDB, lumped there when there are many products).
  const flows: FlowRow[] = [];
  const parts: string[] = [];
  for (const [i, s] of chain.entries()) {
    const t = mainOf(s);
    if (!r.has(t)) continue;
    const cols = await columns(r, t);
    const keys = s.outputs.find((o) => o.name === t)?.keys ?? [];
    const u = await unitOf(r, t, cols);
    unit = u.unit;
    const by = seriesKey(keys, cols, ["product"]);
    const one = onePerRow(keys, by, ["year"]);
    const sum = (c: string) => `CAST(${one ? ident(c) : `sum(${ident(c)})`} AS DOUBLE) AS ${c}`;
    parts.push(`SELECT ${i} AS part, ${lit(phase.get(s.id)!)} AS phase, ${seriesExpr(by, u.mixed)} AS series, CAST(year AS INTEGER) AS year,
        ${sum("stock")}, ${sum("inflow")}, ${sum("outflow")} FROM ${r.table(t)}${one ? "" : " GROUP BY ALL"}`);
  }
  let flowKey = (x: string) => x;
  if (parts.length) {
    const got = await chartRows(r, parts.join(" UNION ALL "), { values: ["stock", "inflow", "outflow"], order: ["part", "series", "year"], links, max: 12 });
    flowKey = got.sortKey;
    for (const x of got.rows) {
      for (const v of ["stock", "inflow", "outflow"]) flows.push({ series: String(x.series), year: Number(x.year), value: Number(x[v] ?? 0), phase: String(x.phase), variable: v });
    }
  }
  const flowSeries = [...new Set(flows.map((f) => f.series))];
  // Monte Carlo ranges of the stock per series (totals over the other keys), where the steps have them.
  const ranges = new Map<string, { lo: number; hi: number }>();
  let rangeNote = "";
  const rangeTables: string[] = [];
  for (const s of chain) {
    const ut = `${s.id}_uncertainty`;
    if (!r.has(ut)) continue;
    const ucols = await columns(r, ut);
    const keys = (s.outputs.find((o) => o.name === mainOf(s))?.keys ?? []).filter((k) => k !== "year");
    const by = seriesKey([...keys, "year"], await columns(r, mainOf(s)), ["product"]);
    const q = [...ucols].filter((c) => /^q\d/.test(c)).sort();
    if (!by || q.length < 2) continue;
    const over = keys.filter((k) => k !== by).join(",");
    // Only the series drawn (a lumped series has no range).
    for (const x of await r.all(`SELECT CAST(${ident(by)} AS VARCHAR) AS series, CAST(year AS INTEGER) AS year, ${ident(q[0]!)} AS lo, ${ident(q[q.length - 1]!)} AS hi
        FROM ${r.table(ut)} WHERE total_over = ${lit(over)} AND variable = 'stock' AND material IS NULL
          AND CAST(${ident(by)} AS VARCHAR) IN (${flowSeries.length ? flowSeries.map(lit).join(", ") : "NULL"})`)) {
      ranges.set(`${x.series}\u0000${x.year}\u0000${phase.get(s.id)}`, { lo: Number(x.lo), hi: Number(x.hi) });
    }
    const pct = (c: string) => Number(c.slice(1).replace("_", "."));
    rangeTables.push(ut);
    rangeNote = ` Shaded: from the ${pct(q[0]!)} % to the ${pct(q[q.length - 1]!)} % quantile of the Monte Carlo draws (${rangeTables.join(", ")}; each draw summed over the other keys before its quantiles are taken).`;
  }
  for (const f of flows) {
    const b = f.variable === "stock" ? ranges.get(`${f.series}\u0000${f.year}\u0000${f.phase}`) : undefined;
    if (b) Object.assign(f, b);
  }
  const seam = seamOf(flows, chain, phase);
  const phaseNote = seam !== undefined ? ` History solid, scenario dashed from ${seam + 0.5} (dotted rule at the seam).` : "";
  if (flows.length) {
    const joined = join(flows, chain, phase, (x) => `${x.variable}\u0000${flowKey(x.series)}\u0000${x.phase}`);
    const s = scaled(lumpSeries(joined, 12), unit);
    const stock = s.rows.filter((x) => x.variable === "stock");
    const io = s.rows.filter((x) => x.variable !== "stock");
    items.push({
      spec: panels({
        title: `Stock in use by product (${names}, ${s.unit})`,
        description: `${describe("Stock in use by product, summed over regions", stock, s.unit)} Each panel has its own scale.${phaseNote}${rangeNote}`,
        rows: stock, yTitle: s.unit, seriesTitle: "product", seam,
      }),
    });
    items.push({
      spec: flowPanels({
        title: `Inflow and outflow by product (${names}, ${s.unit} per year)`,
        description: `${describe("Inflow into the stock by product, summed over regions", io.filter((x) => x.variable === "inflow"), `${s.unit} per year`)} Outflow drawn beside it; each panel has its own scale.${phaseNote}`,
        rows: io, yTitle: `${s.unit} per year`, seriesTitle: "product", seam,
      }),
    });
  }
  // Stock by material.
  const mats: YearRow[] = [];
  const matParts: string[] = [];
  for (const [i, s] of chain.entries()) {
    const t = `${s.id}_materials`;
    if (!r.has(t)) continue;
    const cols = await columns(r, t);
    if (!cols.has("material") || !cols.has("stock")) continue;
    const u = await unitOf(r, t, cols);
    matParts.push(`SELECT ${i} AS part, ${lit(phase.get(s.id)!)} AS phase, ${seriesExpr("material", u.mixed)} AS series, CAST(year AS INTEGER) AS year,
      CAST(sum(stock) AS DOUBLE) AS value FROM ${r.table(t)} GROUP BY ALL`);
  }
  let matKey = (x: string) => x;
  if (matParts.length) {
    const got = await chartRows(r, matParts.join(" UNION ALL "), { values: ["value"], order: ["part", "series", "year"], links, max: 12 });
    matKey = got.sortKey;
    for (const x of got.rows) mats.push({ series: String(x.series), year: Number(x.year), value: Number(x.value), phase: String(x.phase) });
  }
  if (mats.length) {
    const s = scaled(lumpSeries(join(mats, chain, phase, (x) => `${matKey(x.series)}\u0000${x.phase}`), 12), unit);
    items.push({
      spec: panels({
        title: `Material stock in use by material (${names}, ${s.unit})`,
        description: `${describe("Material stock in use by material, summed over regions and products", s.rows, s.unit)} Each panel has its own scale.${phaseNote}`,
        rows: s.rows, yTitle: s.unit, seriesTitle: "material", seam,
      }),
    });
  } else items.push({ note: `No material table (${chain.map((s) => `${s.id}_materials`).join(", ")}) is published: no chart of stock by material.` });
  // Age structure of the stock in the newest year, or the mean age over time.
  const without: ManifestStep[] = [];
  for (const s of chain) {
    const t = `${s.id}_by_cohort`;
    if (!r.has(t)) {
      without.push(s);
      continue;
    }
    const cols = await columns(r, t);
    const keys = s.outputs.find((o) => o.name === t)?.keys ?? [];
    const u = await unitOf(r, t, cols);
    const by = seriesKey(keys, cols, ["product"]);
    // The newest year from the files' statistics, and the one pass over the by-cohort table that the ages of that year need.
    const year = Number(await r.maxOf(t, "year"));
    const one = onePerRow(keys, by, ["cohort", "year"]);
    const rows = (await chartRows(r, `SELECT ${seriesExpr(by, u.mixed)} AS series, CAST(year - cohort AS INTEGER) AS age, CAST(${one ? "stock" : "sum(stock)"} AS DOUBLE) AS value
      FROM ${r.table(t)} WHERE year = ${lit(year)}${one ? "" : " GROUP BY ALL"}`, { values: ["value"], order: ["series", "age"], max: 12 })).rows as unknown as AgeRow[];
    const sc = scaled(lumpSeries(rows, 12), u.unit);
    const total = sc.rows.reduce((a, x) => a + x.value, 0);
    const w = sc.rows.reduce((a, x) => a + x.age * x.value, 0);
    const { drawn, dropped, maxAge } = tail(sc.rows, 0.999);
    const dropNote = dropped > 0 ? ` The oldest ages holding the last ${fmtNum((100 * dropped) / total)} % of each panel's stock are not drawn (ages up to ${maxAge} exist).` : "";
    items.push({
      spec: agePanels({
        title: `Age structure of the stock in ${year} by ${by ?? "total"} (${s.id}, ${sc.unit})`,
        description: `Stock in use in ${year} by age (year − cohort), from ${t}: ${fmtNum(total)} ${sc.unit} in all, stock-weighted mean age ${total ? (w / total).toFixed(1) : "—"} years. One panel per ${by ?? "total"}, each with its own scales.${dropNote}`,
        rows: drawn, yTitle: `stock (${sc.unit})`,
      }),
    });
  }
  if (without.length) {
    items.push({ note: `Age structure not available for ${without.map((s) => s.id).join(", ")}: ${without.length > 1 ? "these steps publish" : "the step publishes"} no ${without.map((s) => `${s.id}_by_cohort`).join(", ")} table. The mean age of the stock over time is shown instead.` });
    const ages: YearRow[] = [];
    const ageParts: string[] = [];
    for (const [i, s] of chain.entries()) {
      const t = mainOf(s);
      if (!r.has(t)) continue;
      const cols = await columns(r, t);
      if (!cols.has("mean_age_stock")) continue;
      const by = seriesKey(s.outputs.find((o) => o.name === t)?.keys ?? [], cols, ["product"]);
      ageParts.push(`SELECT ${i} AS part, ${lit(phase.get(s.id)!)} AS phase, ${seriesExpr(by, false)} AS series, CAST(year AS INTEGER) AS year,
          CAST(sum(mean_age_stock * stock) FILTER (WHERE mean_age_stock IS NOT NULL) AS DOUBLE) AS age_stock,
          CAST(sum(stock) FILTER (WHERE mean_age_stock IS NOT NULL) AS DOUBLE) AS aged_stock
          FROM ${r.table(t)} GROUP BY ALL HAVING aged_stock <> 0`);
    }
    let ageKey = (x: string) => x;
    if (ageParts.length) {
      // A mean age is not additive: the sums of age × stock and of stock are lumped, and "other (n)"
      // is the stock-weighted mean age of the series it holds (series ranked by those two sums).
      const got = await chartRows(r, ageParts.join(" UNION ALL "), { values: ["age_stock", "aged_stock"], order: ["part", "series", "year"], links, max: 10 });
      ageKey = got.sortKey;
      for (const x of got.rows) ages.push({ series: String(x.series), year: Number(x.year), value: Number(x.age_stock) / Number(x.aged_stock), phase: String(x.phase) });
    }
    if (ages.length) {
      // At most 10 series here (chartRows lumped them): lumpSeries, which would add mean ages up, is not needed.
      const rows = join(ages, chain, phase, (x) => `${ageKey(x.series)}\u0000${x.phase}`);
      items.push({
        spec: lines({
          title: `Mean age of the stock by product (${names}, years)`,
          description: `${describe("Stock-weighted mean age of the stock in use by product (weighted over regions by stock; \"other\" is the stock-weighted mean of the products it holds)", rows, "years")}${phaseNote}`,
          rows, yTitle: "mean age (years)", seriesTitle: "product", seam,
        }),
      });
    }
  }
  const intro = chain.length > 1
    ? `${chain.filter((s) => s.continues).map((s) => `${s.id} continues ${s.continues}`).join("; ")}: the scenario starts from the history's cohorts in place. Sums over regions.`
    : `Step ${chain[0]!.id}. Sums over regions.`;
  return { heading: `Stocks and flows: ${names}`, intro, items };
}

/** Per series, the youngest ages holding `share` of its stock (the long tail of old cohorts left out), and what was left out. */
function tail(rows: AgeRow[], share: number): { drawn: AgeRow[]; dropped: number; maxAge: number } {
  const drawn: AgeRow[] = [];
  let dropped = 0;
  for (const series of new Set(rows.map((x) => x.series))) {
    const own = rows.filter((x) => x.series === series).sort((a, b) => a.age - b.age);
    const total = own.reduce((a, x) => a + Math.max(0, x.value), 0);
    let cum = 0;
    let cut = own.length;
    for (let i = 0; i < own.length; i++) {
      cum += Math.max(0, own[i]!.value);
      if (cum >= share * total) {
        cut = i + 1;
        break;
      }
    }
    drawn.push(...own.slice(0, cut));
    dropped += own.slice(cut).reduce((a, x) => a + x.value, 0);
  }
  return { drawn, dropped, maxAge: Math.max(...rows.map((x) => x.age)) };
}

/** Every chart of a run, grouped for the report. */
export async function collectCharts(r: RunReader): Promise<ChartGroup[]> {
  const groups: ChartGroup[] = [];
  for (const s of r.manifest.steps ?? []) if (s.kind === "apparent-consumption") groups.push(...(await consumptionCharts(r, s)));
  for (const chain of cohortChains(r.manifest.steps ?? [])) groups.push(await chainCharts(r, chain));
  return groups;
}
