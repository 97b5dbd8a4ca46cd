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
 * Sums whose result does not depend on thread scheduling: every value is rounded to the
 * resolution (1 g whatever the base unit) as a 64-bit integer, the integers are summed exactly
 * (128-bit), and the total is returned as DOUBLE. As fast as a floating sum in DuckDB, and
 * byte-identical on re-run. One per run (its resolution follows the pipeline's base unit).
 */
export class Exact {
  /** Resolution units (grams) per base unit. */
  readonly scale: number;

  constructor(gramsPerBaseUnit: number) {
    this.scale = gramsPerBaseUnit >= 1 ? Math.round(gramsPerBaseUnit) : gramsPerBaseUnit;
  }

  /** The largest single value that can be summed exactly, in the base unit (2^63 units). */
  get maxValue(): number {
    return 9.2e18 / this.scale;
  }

  sum(expr: string): string {
    return this.total(this.units(expr));
  }

  /** The value in whole resolution units (1 g), as BIGINT: the term that `sum` adds up. */
  units(expr: string): string {
    return `CAST(round((${expr}) * ${this.scale}) AS BIGINT)`;
  }

  /** The sum of terms already in resolution units (from `units`), e.g. computed once per row and summed under several conditions. */
  total(unitsExpr: string): string {
    return this.fromUnits(`sum(${unitsExpr})`);
  }

  /** A whole number of resolution units (an exact sum, HUGEINT) back in the base unit, as DOUBLE. */
  fromUnits(units: string): string {
    return `(CAST(${units} AS DOUBLE) / ${this.scale})`;
  }
}
