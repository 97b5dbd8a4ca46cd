/**
 * Material content by cohort: each model cohort takes its content from the content table
 * (matched by key and cohort year); each cohort of the stock in place takes it the same way
 * (cohort year = first model year − 1 − age), or, for a continued model, keeps the content it
 * had in the earlier model. A cohort that holds a material in some rows but has no row for its
 * own year is an error naming the series, material and cohort year.
 */
import { DataError } from "../../errors.js";
import { candidates, describeSeries, pick } from "../../ops/param-match.js";
import type { Inputs } from "./inputs.js";
import type { O } from "./options.js";
import type { ParamRow } from "./params.js";
import { projectKeys, type Group } from "./groups.js";

export interface GroupContent {
  /** (gn·M) × T content of the model cohorts. */
  content: Float64Array;
  /** gn × T: Σ over materials. */
  total: Float64Array;
  /** (gn·M) × A content of the cohorts in place. */
  initContent: Float64Array;
  /** gn × A: Σ over materials. */
  initTotal: Float64Array;
  /** Per series of the group: has content rows (or carried content). */
  has: Uint8Array;
  /** gn × M: the series holds the material (a content row for it, or carried content). */
  holds: Uint8Array;
}

/** `amounts`: the group's stock in place by age (gn × A), or null; content is needed only where there is stock. */
export function groupContent(o: O, inp: Inputs, g: Group, A: number, materials: string[], rows: { rows: ParamRow[]; keyCols: string[] } | null,
  amounts: Float64Array | null): GroupContent {
  const { T, y0 } = inp;
  const M = materials.length;
  const gn = g.sids.length;
  const out: GroupContent = {
    content: new Float64Array(gn * M * T), total: new Float64Array(gn * T),
    initContent: new Float64Array(gn * M * A), initTotal: new Float64Array(gn * A), has: new Uint8Array(gn), holds: new Uint8Array(gn * M),
  };
  const carried = inp.carried;
  g.sids.forEach((sid, j) => {
    const vals = inp.keyValues[sid]!;
    const where = `series ${describeSeries(o.keys, vals)}`;
    const cand = rows ? candidates(rows.rows, rows.keyCols, projectKeys(o.keys, rows.keyCols, vals)) : [];
    const oldSid = carried ? carried.from[sid]! : -1;
    const carriedHas = oldSid >= 0 && carried!.stock.hasContent(oldSid);
    if (cand.length === 0) {
      if (carriedHas && rows) throw new DataError(`step ${o.id}: ${where} held material content in step ${carried!.stock.step} but has no row in content table ${o.content}: the new cohorts would carry no material`);
      if (!carriedHas) return;
    }
    out.has[j] = 1;
    const byMaterial = materials.map((m) => cand.filter((c) => String(c.raw.material) === m));
    const contentAt = (mi: number, cohort: number, what: string): number => {
      const cm = byMaterial[mi]!;
      if (cm.length === 0) return 0; // this series holds none of the material
      const p = pick(cm, cohort);
      if (typeof p === "string") throw new DataError(`step ${o.id}: ${where}, material ${materials[mi]}, cohort ${cohort}${what}: ${p} in content table ${o.content}`);
      return Number(p.raw.content);
    };
    for (let mi = 0; mi < M; mi++) {
      if (byMaterial[mi]!.length > 0) out.holds[j * M + mi] = 1;
      else if (carriedHas && carried!.stock.materials.includes(materials[mi]!)) out.holds[j * M + mi] = 1;
      for (let c = 0; c < T; c++) {
        const x = contentAt(mi, y0 + c, "");
        out.content[(j * M + mi) * T + c] = x;
        out.total[j * T + c] += x;
      }
      for (let a = 0; a < A; a++) {
        if (!amounts || amounts[j * A + a] === 0) continue;
        let x: number;
        if (carried) {
          const om = carried.stock.materials.indexOf(materials[mi]!);
          x = om >= 0 ? carried.stock.content(oldSid, om, a) : 0;
        } else {
          x = contentAt(mi, y0 - 1 - a, ` (stock in place, age ${a})`);
        }
        out.initContent[(j * M + mi) * A + a] = x;
        out.initTotal[j * A + a] += x;
      }
    }
  });
  return out;
}
