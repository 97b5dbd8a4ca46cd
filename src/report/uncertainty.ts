/**
 * The report's uncertainty section: for each cohort model with Monte Carlo ranges, the totals
 * of stock and outflow in the newest year with their quantiles, and, with a sensitivity
 * table, which assumption drives the spread of the total stock.
 */
import type { RunReader } from "./data.js";
import { esc, fmtNum, num, table, type Cell } from "./html.js";
import type { RunManifest } from "./sections.js";

export async function uncertaintySection(r: RunReader, m: RunManifest): Promise<string> {
  const tables = [...new Set(m.outputs.filter((o) => o.role === "detail" && o.table.endsWith("_uncertainty") && r.has(o.table)).map((o) => o.table))];
  if (!tables.length) return "";
  const parts: string[] = [];
  for (const t of tables) {
    const cols = (await r.all(`SELECT column_name FROM (DESCRIBE SELECT * FROM ${r.table(t)})`)).map((c) => String(c.column_name));
    const q = cols.filter((c) => /^q\d/.test(c)).sort();
    const keys = cols.slice(0, cols.indexOf("total_over"));
    const newest = Number((await r.all(`SELECT max(year) AS y FROM ${r.table(t)}`))[0]!.y);
    // A model's own totals (an aggregate step's table holds only group totals, "key:groups").
    const own = Number((await r.all(`SELECT count(*) AS n FROM ${r.table(t)} WHERE total_over IS NOT NULL AND total_over NOT LIKE '%:%'`))[0]!.n) > 0;
    const rows = await r.all(`SELECT total_over, ${keys.map((k) => `"${k}"`).join(", ")}, variable, central, mean, sd, ${q.map((c) => `"${c}"`).join(", ")}, unit
      FROM ${r.table(t)} WHERE total_over IS NOT NULL AND ${own ? "total_over NOT LIKE '%:%'" : "TRUE"} AND material IS NULL AND variable IN ('stock', 'outflow') AND year = ${newest}
      ORDER BY length(total_over) DESC, total_over, ${keys.map((k) => `"${k}"`).join(", ")}, variable DESC LIMIT 60`);
    const pct = (c: string) => `${Number(c.slice(1).replace("_", "."))} %`;
    const body = rows.map((x) => [
      keys.map((k) => x[k]).filter((v) => v !== null && v !== undefined).join(" / ") || "all series",
      String(x.variable), num(x.central, String(x.unit ?? "")), ...q.map((c) => num(x[c])),
      num(Number(x.central) ? (100 * (Number(x[q[q.length - 1]!]) - Number(x[q[0]!]))) / 2 / Math.abs(Number(x.central)) : null, "%"),
    ] as Cell[]);
    parts.push(table({
      caption: `${t}: totals in ${newest} (each draw summed before its quantiles are taken)`,
      headers: ["total of", "variable", "central", ...q.map(pct), `± half of ${pct(q[0]!)}–${pct(q[q.length - 1]!)}`], numeric: [2, ...q.map((_, i) => 3 + i), 3 + q.length], rows: body, cls: "uncertainty",
    }));
    const st = t.replace(/_uncertainty$/, "_sensitivity");
    if (r.has(st)) {
      const all = keys.join(",");
      const s = await r.all(`SELECT assumption, first_order, first_order_low, first_order_high, total_effect, total_effect_low, total_effect_high, base_samples, confidence
        FROM ${r.table(st)} WHERE total_over = '${all.replace(/'/g, "''")}' AND variable = 'stock' AND year = ${newest} ORDER BY total_effect DESC`);
      if (s.length) {
        const n = Number(s[0]!.base_samples);
        const c = Number(s[0]!.confidence);
        parts.push(table({
          caption: `${st}: what drives the spread of the total stock in ${newest} (first-order S and total-effect ST; ${fmtNum(100 * c)} % bootstrap intervals; N = ${n})`,
          headers: ["assumption", "S", "S low", "S high", "ST", "ST low", "ST high"], numeric: [1, 2, 3, 4, 5, 6],
          rows: s.map((x) => [String(x.assumption), num(x.first_order), num(x.first_order_low), num(x.first_order_high), num(x.total_effect), num(x.total_effect_low), num(x.total_effect_high)] as Cell[]),
          cls: "sensitivity",
        }));
      }
    }
  }
  return `<section id="uncertainty"><h2>Uncertainty</h2><p>Monte Carlo ranges of the cohort models (the central figures are the deterministic run's; see the method). ${esc("Quantiles: Hyndman & Fan definition 7.")}</p>
${parts.join("\n")}</section>`;
}
