/** Safe quoting of identifiers and literals before they reach SQL. */

export function ident(name: string): string {
  return `"${name.replace(/"/g, '""')}"`;
}

export function lit(value: string | number | boolean | null): string {
  if (value === null) return "NULL";
  if (typeof value === "number") {
    if (!Number.isFinite(value)) return Number.isNaN(value) ? "'NaN'::DOUBLE" : value > 0 ? "'Infinity'::DOUBLE" : "'-Infinity'::DOUBLE";
    return String(value);
  }
  if (typeof value === "boolean") return value ? "TRUE" : "FALSE";
  return `'${value.replace(/'/g, "''")}'`;
}

export function idents(names: readonly string[]): string {
  return names.map(ident).join(", ");
}

/** MAP literal of key column names to their (text) values, for audit rows. */
export function keyMap(cols: readonly string[], alias = ""): string {
  if (cols.length === 0) return "MAP {}::MAP(VARCHAR, VARCHAR)";
  const p = alias ? `${alias}.` : "";
  return `MAP([${cols.map((c) => lit(c)).join(", ")}], [${cols.map((c) => `CAST(${p}${ident(c)} AS VARCHAR)`).join(", ")}])`;
}

/**
 * Sum whose result does not depend on thread scheduling: exact decimal
 * accumulation (12 decimals, 26 integer digits), returned as DOUBLE.
 */
export function exactSum(expr: string): string {
  return `CAST(SUM(CAST(${expr} AS DECIMAL(38, 12))) AS DOUBLE)`;
}
