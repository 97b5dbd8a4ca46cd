/** Mass-unit registry and the piece unit. Factors are in tonnes. */

export const MASS_UNITS: Readonly<Record<string, number>> = {
  g: 1e-6,
  kg: 1e-3,
  t: 1,
  kt: 1e3,
  Mt: 1e6,
  Gt: 1e9,
  Gg: 1e3,
  Tg: 1e6,
};

/** Spellings accepted for goods counted in pieces. Stored as `piece`. */
export const PIECE_SPELLINGS = ["piece", "pieces", "pcs", "items", "units", "number"] as const;
export const PIECE = "piece";

export function isMassUnit(u: string): boolean {
  return Object.prototype.hasOwnProperty.call(MASS_UNITS, u);
}

export function isPieceUnit(u: string): boolean {
  return (PIECE_SPELLINGS as readonly string[]).includes(u);
}

export function acceptedUnits(): string {
  return [...Object.keys(MASS_UNITS), ...PIECE_SPELLINGS].join(", ");
}

/** Factor that converts a quantity in `from` into `base` (both mass units). */
export function massFactor(from: string, base: string): number {
  const f = MASS_UNITS[from];
  const b = MASS_UNITS[base];
  if (f === undefined || b === undefined) throw new Error(`not a mass unit: ${from} or ${base}`);
  return f / b;
}

/** SQL CASE expression converting a unit-text expression into a factor to `base` (NULL for pieces, unknown → NULL too). */
export function sqlMassFactorCase(unitExpr: string, base: string): string {
  const arms = Object.keys(MASS_UNITS)
    .map((u) => `WHEN '${u}' THEN ${massFactor(u, base)}`)
    .join(" ");
  return `(CASE ${unitExpr} ${arms} ELSE NULL END)`;
}

export function sqlIsPiece(unitExpr: string): string {
  return `(${unitExpr} IN (${PIECE_SPELLINGS.map((s) => `'${s}'`).join(", ")}))`;
}
