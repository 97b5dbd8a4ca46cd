/** The schema of a loaded source, from its declaration alone (what sources/load.ts produces). */
import type { ColumnSpecT, SourceT } from "../spec/schema.js";
import type { ColumnDecl, TableSchema } from "../steps/types.js";

const TYPES: Record<string, string> = { text: "VARCHAR", integer: "BIGINT", number: "DOUBLE", quantity: "DOUBLE", boolean: "BOOLEAN" };

const typeOf = (c: ColumnSpecT) => (typeof c === "string" ? c : c.type);

export function sourceSchema(name: string, src: SourceT): TableSchema {
  const columns: ColumnDecl[] = [];
  const hasQty = Object.values(src.columns).some((c) => typeOf(c) === "quantity");
  for (const [col, spec] of Object.entries(src.columns)) {
    const t = typeOf(spec);
    if (hasQty && col === "unit") continue; // replaced by the unit of the converted quantities, below
    columns.push({
      name: col,
      type: TYPES[t]!,
      description: `column ${col} of source ${name}${t === "quantity" ? " (converted to the unit in the unit column)" : ""}`,
      ...(t === "quantity" ? { unit: "unit-column" as const } : t === "number" ? { unit: "1" as const } : col === "year" && t === "integer" ? { unit: "year" as const } : {}),
    });
  }
  if (hasQty) {
    const at = Object.keys(src.columns).indexOf("unit");
    const unitCol: ColumnDecl = { name: "unit", type: "VARCHAR", description: "unit of the quantity columns: the pipeline's base mass unit, or piece" };
    if (at >= 0) columns.splice(at, 0, unitCol);
    else columns.push(unitCol);
  }
  const keyNames = Object.entries(src.columns).filter(([, c]) => typeof c !== "string" && c.key).map(([n]) => n);
  const keys = [...keyNames.filter((k) => k !== "year"), ...(keyNames.includes("year") ? ["year"] : [])];
  return { columns, keys };
}
