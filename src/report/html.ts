/** Small HTML helpers for the report: escaping, readable numbers with their exact value, tables, the style sheet. */

export function esc(v: unknown): string {
  return String(v ?? "").replace(/&/g, "&amp;").replace(/</g, "&lt;").replace(/>/g, "&gt;").replace(/"/g, "&quot;").replace(/'/g, "&#39;");
}

const GROUPED = (digits: number) => new Intl.NumberFormat("en-US", { maximumFractionDigits: digits, useGrouping: true });
const FMT = [GROUPED(0), GROUPED(1), GROUPED(2)];
const SMALL = new Intl.NumberFormat("en-US", { maximumSignificantDigits: 3 });

/** A number for reading: thousands separators, a few digits; very small or very large ones in exponent form. */
export function fmtNum(v: number): string {
  if (!Number.isFinite(v)) return String(v);
  if (v === 0) return "0";
  const a = Math.abs(v);
  if (a < 1e-3 || a >= 1e15) return v.toExponential(2).replace(/\.?0+e/, "e").replace("e+", "e");
  if (Number.isInteger(v)) return FMT[0]!.format(v);
  if (a >= 1e4) return FMT[0]!.format(v);
  if (a >= 100) return FMT[1]!.format(v);
  if (a >= 1) return FMT[2]!.format(v);
  return SMALL.format(v);
}

export function fmtBytes(n: number): string {
  if (n < 1024) return `${n} B`;
  const u = ["KiB", "MiB", "GiB", "TiB"];
  let v = n / 1024;
  let i = 0;
  while (v >= 1024 && i < u.length - 1) {
    v /= 1024;
    i++;
  }
  return `${v.toFixed(v >= 100 ? 0 : 1)} ${u[i]}`;
}

/** A table cell: plain text (escaped), or a whole <td> already written. */
export type Cell = string | { td: string };

/** A numeric cell: readable text, the exact value in data-value (no data-value for a missing one). */
export function num(v: unknown, suffix = ""): Cell {
  if (v === null || v === undefined || (typeof v === "number" && Number.isNaN(v))) return { td: '<td class="num empty">—</td>' };
  const n = Number(v);
  return { td: `<td class="num" data-value="${esc(typeof v === "bigint" ? v.toString() : String(n))}">${esc(fmtNum(n))}${suffix ? `&#8239;${esc(suffix)}` : ""}</td>` };
}

/** A year: no thousands separator, the value in data-value. */
export function yearCell(v: unknown): Cell {
  if (v === null || v === undefined) return { td: '<td class="num empty">—</td>' };
  return { td: `<td class="num" data-value="${esc(v)}">${esc(v)}</td>` };
}

/** A cell of HTML written by the caller. */
export function html(inner: string, cls?: string): Cell {
  return { td: `<td${cls ? ` class="${esc(cls)}"` : ""}>${inner}</td>` };
}

function cellHtml(c: Cell): string {
  return typeof c === "string" ? `<td>${esc(c)}</td>` : c.td;
}

/** A table with a caption; numeric header cells are right-aligned when `numeric` names them. */
export function table(o: { caption?: string; headers: string[]; numeric?: number[]; rows: Cell[][]; cls?: string }): string {
  const numeric = new Set(o.numeric ?? []);
  const head = o.headers.map((h, i) => `<th scope="col"${numeric.has(i) ? ' class="num"' : ""}>${esc(h)}</th>`).join("");
  const body = o.rows.map((r) => `<tr>${r.map(cellHtml).join("")}</tr>`).join("\n");
  return `<div class="scroll"><table${o.cls ? ` class="${esc(o.cls)}"` : ""}>${o.caption ? `<caption>${esc(o.caption)}</caption>` : ""}<thead><tr>${head}</tr></thead><tbody>\n${body}\n</tbody></table></div>`;
}

export function badge(status: string): string {
  const s = status.toLowerCase();
  const cls = s === "pass" || s === "ok" ? "pass" : s === "fail" || s === "failed" ? "fail" : "other";
  return `<span class="badge ${cls}">${esc(status)}</span>`;
}

/** The style sheet: system fonts only, nothing from outside the file. */
export const CSS = `
:root { --fg: #1d232b; --muted: #5b6673; --line: #d9dee4; --bg: #ffffff; --band: #f5f7f9; --accent: #3b6ea8; --bad: #b3261e; --warn: #8a5a00; --good: #2e7d32; }
* { box-sizing: border-box; }
html { -webkit-text-size-adjust: 100%; }
body { margin: 0; font: 15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; color: var(--fg); background: var(--bg); }
main { max-width: 1040px; margin: 0 auto; padding: 24px 20px 64px; }
header.top { border-bottom: 3px solid var(--accent); padding-bottom: 12px; margin-bottom: 8px; }
h1 { font-size: 1.8em; margin: 0 0 4px; }
h2 { font-size: 1.35em; margin: 40px 0 8px; padding-bottom: 4px; border-bottom: 1px solid var(--line); }
h3 { font-size: 1.1em; margin: 28px 0 6px; }
p, dl { margin: 8px 0; }
.muted, .meta { color: var(--muted); }
.meta { display: flex; flex-wrap: wrap; gap: 4px 20px; font-size: 0.93em; margin: 6px 0 0; padding: 0; list-style: none; }
.notice { border-left: 4px solid var(--warn); background: #fff8e6; padding: 8px 12px; margin: 14px 0; }
.notice.bad { border-left-color: var(--bad); background: #fdecea; }
nav.toc { font-size: 0.93em; margin: 12px 0; }
nav.toc a { margin-right: 14px; color: var(--accent); }
.scroll { overflow-x: auto; margin: 8px 0 16px; }
table { border-collapse: collapse; font-size: 0.9em; min-width: 50%; }
caption { text-align: left; font-weight: 600; padding: 4px 0; }
th, td { padding: 3px 10px 3px 6px; border-bottom: 1px solid var(--line); text-align: left; vertical-align: top; }
th { background: var(--band); font-weight: 600; white-space: nowrap; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
td.empty { color: var(--muted); text-align: right; }
tbody tr:nth-child(even) td { background: #fafbfc; }
code, .mono { font-family: ui-monospace, "SFMono-Regular", Menlo, Consolas, monospace; font-size: 0.92em; }
.badge { display: inline-block; padding: 0 6px; border-radius: 3px; font-size: 0.85em; font-weight: 600; }
.badge.pass { color: var(--good); background: #e8f5e9; }
.badge.fail { color: var(--bad); background: #fdecea; }
.badge.other { color: var(--muted); background: var(--band); }
.badge.prov { color: var(--warn); background: #fff3d6; }
dl.glance { display: flex; flex-wrap: wrap; gap: 10px; margin: 14px 0; }
dl.glance .kv { flex: 1 1 180px; border: 1px solid var(--line); border-top: 3px solid var(--accent); border-radius: 4px; padding: 6px 10px; background: var(--band); }
dl.glance .kv.good { border-top-color: var(--good); }
dl.glance .kv.warn { border-top-color: #d69a00; }
dl.glance .kv.bad { border-top-color: var(--bad); }
dl.glance dt { font-weight: 600; font-size: 0.85em; color: var(--muted); text-transform: uppercase; letter-spacing: 0.04em; }
dl.glance dd { margin: 2px 0 0; font-size: 0.95em; }
table.failing td:nth-child(3), table.checks td:nth-child(2) { white-space: nowrap; }
figure { margin: 16px 0 24px; }
figure svg { max-width: 100%; height: auto; display: block; }
figcaption { color: var(--muted); font-size: 0.9em; margin-top: 4px; max-width: 80ch; }
dl.method dt { font-weight: 600; margin-top: 8px; }
dl.method dd { margin: 2px 0 0 0; max-width: 85ch; }
footer { margin-top: 48px; color: var(--muted); font-size: 0.85em; border-top: 1px solid var(--line); padding-top: 8px; }
@media print { h2 { break-after: avoid; } figure { break-inside: avoid; } }
`;
