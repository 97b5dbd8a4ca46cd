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

let sumScale = 1e6;

/**
 * Sets the resolution of exact sums from the pipeline's base unit: 1 g whatever the unit
 * (scale = grams per base unit), so one value may reach 9.2 × 10^12 t.
 */
export function setExactSumUnit(gramsPerBaseUnit: number): void {
  sumScale = gramsPerBaseUnit >= 1 ? Math.round(gramsPerBaseUnit) : gramsPerBaseUnit;
}

/**
 * Sum whose result does not depend on thread scheduling: every value is rounded to the
 * resolution (1 g) as a 64-bit integer, the integers are summed exactly (128-bit), and the
 * total is returned as DOUBLE. As fast as a floating sum in DuckDB, and byte-identical on re-run.
 */
export function exactSum(expr: string): string {
  return exactTotal(exactUnits(expr));
}

/** The value in whole resolution units (1 g), as BIGINT: the term that exactSum adds up. */
export function exactUnits(expr: string): string {
  return `CAST(round((${expr}) * ${sumScale}) AS BIGINT)`;
}

/** exactSum of terms already in resolution units (from exactUnits), e.g. computed once per row and summed under several conditions. */
export function exactTotal(unitsExpr: string): string {
  return fromUnits(`sum(${unitsExpr})`);
}

/** A whole number of resolution units (an exact sum, HUGEINT) back in the base unit, as DOUBLE: what exactTotal returns. */
export function fromUnits(units: string): string {
  return `(CAST(${units} AS DOUBLE) / ${sumScale})`;
}
