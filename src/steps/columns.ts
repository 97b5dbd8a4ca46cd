/** Small builders for the columns step kinds declare (types, units and the data dictionary's text). */
import type { ColumnDecl, TableSchema } from "./types.js";

/** The declaration of `name` in a schema (for key columns carried through), or undefined. */
export function columnOf(schema: TableSchema, name: string): ColumnDecl | undefined {
  return schema.columns.find((c) => c.name === name);
}

export function hasColumns(schema: TableSchema, names: readonly string[]): string[] {
  return names.filter((n) => !schema.columns.some((c) => c.name === n));
}

export const text = (name: string, description: string): ColumnDecl => ({ name, type: "VARCHAR", description });
export const year = (type = "BIGINT", description = "calendar year"): ColumnDecl => ({ name: "year", type, unit: "year", description });
export const mass = (name: string, description: string): ColumnDecl => ({ name, type: "DOUBLE", unit: "unit-column", description });
export const share = (name: string, description: string): ColumnDecl => ({ name, type: "DOUBLE", unit: "1", description });
export const years = (name: string, description: string): ColumnDecl => ({ name, type: "DOUBLE", unit: "years", description });
export const flag = (name: string, description: string): ColumnDecl => ({ name, type: "BOOLEAN", description });
export const unitColumn = (what = "the mass columns"): ColumnDecl => ({ name: "unit", type: "VARCHAR", description: `unit of ${what}: the pipeline's base mass unit (or piece)` });

/** A key column carried from an input, with its type, or a VARCHAR when the step casts it. */
export function keyFrom(schema: TableSchema, name: string, cast?: string): ColumnDecl {
  const c = columnOf(schema, name);
  return { name, type: cast ?? c?.type ?? "VARCHAR", description: c?.description && !c.description.startsWith("column ") ? c.description : `key: ${name}` };
}
