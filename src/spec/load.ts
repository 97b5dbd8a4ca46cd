/** Reading a pipeline file: size and alias limits, YAML with positions, variables, validation. */
import { createHash } from "node:crypto";
import { readFileSync, statSync } from "node:fs";
import path from "node:path";
import { isMap, isScalar, LineCounter, parseDocument, type Document, type Node } from "yaml";
import { z } from "zod";
import { PipelineError } from "../errors.js";
import { STEP_KINDS, stepKind, stepSchemaFor } from "../steps/registry.js";
import { AuditOptions, PipelineBase, type Pipeline } from "./schema.js";

export const MAX_PIPELINE_BYTES = 1024 * 1024;
export const MAX_ALIASES = 100;

export interface LoadedPipeline {
  file: string;
  dir: string;
  sha256: string;
  variables: Record<string, string>;
  pipeline: Pipeline;
  /** "file:line:col: key.path" of a place in the file (the closest existing node), for messages. */
  locate(p: readonly PathKey[], key?: string): string;
}

export type PathKey = string | number;

class Locator {
  constructor(
    readonly file: string,
    readonly doc: Document,
    readonly lc: LineCounter,
  ) {}

  /** "file:line:col" of the node at `p` (the closest existing ancestor when absent); `key` points at a map key. */
  at(p: readonly PathKey[], key?: string): string {
    let node: Node | null = null;
    for (let i = p.length; i >= 0 && !node; i--) {
      const n = p.length === 0 || i > 0 ? (this.doc.getIn(p.slice(0, i), true) as Node | undefined) : undefined;
      if (n && typeof n === "object" && "range" in n) node = n;
      if (i === 0 && !node) node = this.doc.contents as Node | null;
    }
    if (key !== undefined && node && isMap(node)) {
      const pair = node.items.find((it) => isScalar(it.key) && String(it.key.value) === key);
      if (pair && isScalar(pair.key) && pair.key.range) return this.pos(pair.key.range[0]);
    }
    const off = node?.range?.[0] ?? 0;
    return this.pos(off);
  }

  pos(offset: number): string {
    const { line, col } = this.lc.linePos(offset);
    return `${this.file}:${line}:${col}`;
  }
}

function pathText(p: readonly PathKey[]): string {
  return p.map((k, i) => (typeof k === "number" ? `[${k}]` : i === 0 ? k : `.${k}`)).join("") || "(top level)";
}

function show(v: unknown): string {
  if (v === undefined) return "nothing";
  const s = JSON.stringify(v);
  return s === undefined ? String(v) : s.length > 80 ? s.slice(0, 77) + "..." : s;
}

function getAt(data: unknown, p: readonly PathKey[]): unknown {
  let cur: unknown = data;
  for (const k of p) {
    if (cur === null || typeof cur !== "object") return undefined;
    cur = (cur as Record<PathKey, unknown>)[k];
  }
  return cur;
}

export function levenshtein(a: string, b: string): number {
  const d = Array.from({ length: a.length + 1 }, (_, i) => [i, ...Array<number>(b.length).fill(0)]);
  for (let j = 1; j <= b.length; j++) d[0]![j] = j;
  for (let i = 1; i <= a.length; i++)
    for (let j = 1; j <= b.length; j++)
      d[i]![j] = Math.min(d[i - 1]![j]! + 1, d[i]![j - 1]! + 1, d[i - 1]![j - 1]! + (a[i - 1] === b[j - 1] ? 0 : 1));
  return d[a.length]![b.length]!;
}

export function closest(word: string, candidates: readonly string[]): string | undefined {
  let best: string | undefined;
  let bestD = Infinity;
  for (const c of candidates) {
    const dist = levenshtein(word.toLowerCase(), c.toLowerCase());
    if (dist < bestD) [best, bestD] = [c, dist];
  }
  return best !== undefined && bestD <= Math.max(2, Math.floor(word.length / 3)) ? best : undefined;
}

/** Allowed keys of the object schema reached by following `p` inside `schema`. */
function keysAt(schema: z.ZodType, p: readonly PathKey[]): string[] {
  let s: z.ZodType | undefined = schema;
  const unwrap = (x: z.ZodType): z.ZodType => {
    let cur: any = x;
    for (let guard = 0; guard < 10; guard++) {
      const t = cur?._zod?.def?.type;
      if (t === "optional" || t === "default" || t === "nullable" || t === "prefault") cur = cur._zod.def.innerType;
      else if (t === "pipe") cur = cur._zod.def.in;
      else if (t === "union") cur = cur._zod.def.options.find((o: any) => unwrapType(o) === "object") ?? cur._zod.def.options[0];
      else break;
    }
    return cur;
  };
  const unwrapType = (x: any): string => {
    let cur = x;
    while (["optional", "default", "nullable"].includes(cur?._zod?.def?.type)) cur = cur._zod.def.innerType;
    return cur?._zod?.def?.type;
  };
  for (const k of p) {
    if (!s) return [];
    const u: any = unwrap(s);
    const t = u?._zod?.def?.type;
    if (t === "object") s = u._zod.def.shape[k as string];
    else if (t === "array") s = u._zod.def.element;
    else if (t === "record") s = u._zod.def.valueType;
    else return [];
  }
  const u: any = s ? unwrap(s) : undefined;
  return u?._zod?.def?.type === "object" ? Object.keys(u._zod.def.shape) : [];
}

/** The schema found by following `p` inside `schema` (through optionals, defaults, objects, arrays, records). */
function schemaAt(schema: z.ZodType, p: readonly PathKey[]): any {
  let cur: any = schema;
  const unwrap = (x: any) => {
    for (let g = 0; g < 10 && x; g++) {
      const t = x?._zod?.def?.type;
      if (t === "optional" || t === "default" || t === "nullable" || t === "prefault") x = x._zod.def.innerType;
      else if (t === "pipe") x = x._zod.def.in;
      else break;
    }
    return x;
  };
  for (const k of p) {
    cur = unwrap(cur);
    const t = cur?._zod?.def?.type;
    if (t === "object") cur = cur._zod.def.shape[k as string];
    else if (t === "array") cur = cur._zod.def.element;
    else if (t === "record") cur = cur._zod.def.valueType;
    else if (t === "union") cur = cur._zod.def.options.find((o: any) => ["object", "array", "record"].includes(unwrap(o)?._zod?.def?.type));
    else return undefined;
  }
  return unwrap(cur);
}

/** What a schema accepts, in words: "a mapping with keys a, b", "one of x, y", "a number", … */
function accepted(sc: any): string {
  const t = sc?._zod?.def?.type;
  if (t === "union") return sc._zod.def.options.map(accepted).join("; or ");
  if (t === "enum") return `one of ${Object.values(sc._zod.def.entries).map((v) => JSON.stringify(v)).join(", ")}`;
  if (t === "literal") return sc._zod.def.values.map((v: unknown) => JSON.stringify(v)).join(" or ");
  if (t === "object") return `a mapping with keys ${Object.keys(sc._zod.def.shape).join(", ")}`;
  if (t === "array") return "a list";
  if (t === "record") return "a mapping";
  if (t === "boolean") return "true or false";
  if (t === "number") return "a number";
  if (t === "string") return "a text";
  if (t === "optional" || t === "default" || t === "nullable") return accepted(sc._zod.def.innerType);
  return "a value of the documented form";
}

function describeIssue(issue: z.core.$ZodIssue, data: unknown, schema: z.ZodType, base: readonly PathKey[], loc: Locator): string[] {
  const p = [...base, ...(issue.path as PathKey[])];
  if (issue.code === "unrecognized_keys") {
    const allowed = keysAt(schema, issue.path as PathKey[]);
    return issue.keys.map((k) => {
      const near = closest(k, allowed);
      return `${loc.at(p, k)}: ${pathText([...p, k])}: unknown key ${show(k)}${near ? `; did you mean ${show(near)}?` : ""} (accepted: ${allowed.join(", ")})`;
    });
  }
  const value = getAt(data, issue.path as PathKey[]);
  let msg = issue.message;
  if (issue.code === "invalid_value" && "values" in issue) {
    const near = typeof value === "string" ? closest(value, issue.values.map(String)) : undefined;
    msg = `got ${show(value)}; accepted: ${issue.values.map((v) => show(v)).join(", ")}${near ? ` (did you mean ${show(near)}?)` : ""}`;
  } else if (issue.code === "invalid_union") {
    const sc = schemaAt(schema, issue.path as PathKey[]);
    const near = typeof value === "string" && sc?._zod?.def?.type === "union"
      ? closest(value, sc._zod.def.options.flatMap((o: any) => (o?._zod?.def?.type === "enum" ? Object.values(o._zod.def.entries).map(String) : [])))
      : undefined;
    msg = `got ${show(value)}; accepted: ${sc ? accepted(sc) : "see the README"}${near ? ` (did you mean ${show(near)}?)` : ""}`;
  } else if (issue.code === "too_small" && (issue as { origin?: string }).origin === "array") {
    msg = `needs at least ${(issue as { minimum?: number | bigint }).minimum} item(s)${value !== undefined ? ` (got ${show(value)})` : ""}`;
  } else if (issue.code === "invalid_type") {
    msg = value === undefined ? `missing (expected ${issue.expected})` : `expected ${issue.expected}, got ${show(value)}`;
  } else if (value !== undefined && typeof value !== "object") {
    msg = `${msg} (got ${show(value)})`;
  }
  return [`${loc.at(p)}: ${pathText(p)}: ${msg}`];
}

function validate<S extends z.ZodType>(schema: S, data: unknown, base: readonly PathKey[], loc: Locator, errors: string[]): z.output<S> | undefined {
  const r = schema.safeParse(data);
  if (r.success) return r.data;
  for (const issue of r.error.issues) errors.push(...describeIssue(issue, data, schema, base, loc));
  return undefined;
}

const VAR = /\$\{([^}]*)\}/g;

/** Replaces ${NAME} in every string scalar; `$${` stays a literal `${`. */
function substitute(data: unknown, vars: Record<string, string>, loc: Locator, p: PathKey[], errors: string[], used: Set<string>): unknown {
  if (typeof data === "string") {
    const parts = data.split("$${");
    const out = parts.map((part) =>
      part.replace(VAR, (_m, name: string) => {
        if (!/^[A-Za-z_][A-Za-z0-9_]*$/.test(name)) {
          errors.push(`${loc.at(p)}: ${pathText(p)}: invalid variable reference \${${name}}; names hold letters, digits and _`);
          return "";
        }
        used.add(name);
        if (!(name in vars)) {
          const near = closest(name, Object.keys(vars));
          errors.push(`${loc.at(p)}: ${pathText(p)}: unknown variable \${${name}}; declare it under "variables:" or pass --set ${name}=value${near ? ` (did you mean \${${near}}?)` : ""}`);
          return "";
        }
        return vars[name]!;
      }),
    );
    const joined = out.join("${");
    // A whole-value reference to a number keeps the YAML type simple: callers see a string, schemas coerce where needed.
    return joined;
  }
  if (Array.isArray(data)) return data.map((v, i) => substitute(v, vars, loc, [...p, i], errors, used));
  if (data && typeof data === "object") {
    const o: Record<string, unknown> = {};
    for (const [k, v] of Object.entries(data)) o[k] = p.length === 0 && k === "variables" ? v : substitute(v, vars, loc, [...p, k], errors, used);
    return o;
  }
  return data;
}

export function parseSet(pairs: readonly string[]): Record<string, string> {
  const out: Record<string, string> = {};
  for (const pair of pairs) {
    const eq = pair.indexOf("=");
    if (eq <= 0) throw new PipelineError(`--set ${pair}: expected NAME=value`);
    out[pair.slice(0, eq)] = pair.slice(eq + 1);
  }
  return out;
}

export function loadPipeline(file: string, sets: Record<string, string> = {}): LoadedPipeline {
  const abs = path.resolve(file);
  let size: number;
  try {
    size = statSync(abs).size;
  } catch {
    throw new PipelineError(`${file}: pipeline file not found`);
  }
  if (size > MAX_PIPELINE_BYTES) throw new PipelineError(`${file}: pipeline file is ${size} bytes; at most ${MAX_PIPELINE_BYTES} are accepted`);
  // The hash is of the bytes on disk (not of decoded text, which differs for invalid UTF-8).
  const bytes = readFileSync(abs);
  const text = bytes.toString("utf8");
  const lc = new LineCounter();
  const doc = parseDocument(text, { lineCounter: lc, prettyErrors: false, uniqueKeys: true, strict: true });
  const loc = new Locator(file, doc, lc);
  if (doc.errors.length > 0) {
    const shown = doc.errors.slice(0, 5).map((e) => `${loc.pos(e.pos[0])}: YAML syntax error: ${e.message.split("\n")[0]}`);
    throw new PipelineError(shown.join("\n") + (doc.errors.length > 5 ? `\n… and ${doc.errors.length - 5} more (the first is usually the cause; a value holding { } [ ] : or $\{ may need quotes)` : ""));
  }
  let data: unknown;
  try {
    data = doc.toJS({ maxAliasCount: MAX_ALIASES });
  } catch (e) {
    throw new PipelineError(`${file}: refused: ${(e as Error).message} (at most ${MAX_ALIASES} alias expansions are accepted)`);
  }
  if (data === null || typeof data !== "object" || Array.isArray(data)) {
    throw new PipelineError(`${file}:1:1: a pipeline file must be a mapping with keys name, sources, steps`);
  }
  const errors: string[] = [];

  // Variables: file defaults, overridden by --set.
  const declared = (data as Record<string, unknown>).variables;
  const vars: Record<string, string> = {};
  const unset: string[] = [];
  if (declared && typeof declared === "object" && !Array.isArray(declared)) {
    for (const [k, v] of Object.entries(declared)) {
      if (v === null || v === undefined) unset.push(k);
      else vars[k] = String(v);
    }
  }
  for (const [k, v] of Object.entries(sets)) {
    if (!(k in vars) && !unset.includes(k)) {
      const near = closest(k, [...Object.keys(vars), ...unset]);
      errors.push(`--set ${k}: no such variable in ${file}${near ? `; did you mean ${near}?` : ""} (declared: ${[...Object.keys(vars), ...unset].join(", ") || "none"})`);
    }
    vars[k] = v;
  }
  const used = new Set<string>();
  const unsetLeft = unset.filter((u) => !(u in sets));
  for (const u of unsetLeft) delete vars[u];
  data = substitute(data, vars, loc, [], errors, used);
  for (const u of unsetLeft) {
    if (used.has(u)) errors.push(`${loc.at(["variables", u])}: variables.${u}: has no default and was not given; pass --set ${u}=value`);
  }
  // Drop the duplicate "unknown variable" messages for unset ones.
  const filtered = errors.filter((e) => !unsetLeft.some((u) => e.includes(`unknown variable \${${u}}`)));

  const base = validate(PipelineBase, data, [], loc, filtered);
  const steps: Pipeline["steps"] = [];
  const rawSteps = (data as Record<string, unknown>).steps;
  if (Array.isArray(rawSteps)) {
    const known = STEP_KINDS.map((k) => k.kind);
    const ids = new Set<string>();
    rawSteps.forEach((s, i) => {
      if (!s || typeof s !== "object" || Array.isArray(s)) {
        filtered.push(`${loc.at(["steps", i])}: steps[${i}]: a step must be a mapping with id, kind and the kind's options (got ${show(s)})`);
        return;
      }
      const kind = (s as Record<string, unknown>).kind;
      if (kind === undefined) {
        // A misspelt `kind` is an unknown key at its own line, with the closest known key.
        const allKeys = [...new Set(["id", "kind", "publish", ...STEP_KINDS.flatMap((k) => Object.keys(k.options.shape))])];
        const unknown = Object.keys(s).filter((k) => !allKeys.includes(k));
        for (const k of unknown) {
          const near = closest(k, allKeys);
          filtered.push(`${loc.at(["steps", i], k)}: steps[${i}].${k}: unknown key ${show(k)}${near ? `; did you mean ${show(near)}?` : ""}`);
        }
        filtered.push(`${loc.at(["steps", i])}: steps[${i}].kind: missing; every step needs a kind (known kinds: ${known.join(", ")})`);
        return;
      }
      if (typeof kind !== "string") {
        filtered.push(`${loc.at(["steps", i, "kind"])}: steps[${i}].kind: expected a step kind name, got ${show(kind)} (known kinds: ${known.join(", ")})`);
        return;
      }
      if (!stepKind(kind)) {
        const near = closest(kind, known);
        filtered.push(`${loc.at(["steps", i, "kind"])}: steps[${i}].kind: unknown step kind ${show(kind)}${near ? `; did you mean ${show(near)}?` : ""} (known kinds: ${known.join(", ")})`);
        return;
      }
      const parsed = validate(stepSchemaFor(kind), s, ["steps", i], loc, filtered);
      if (!parsed) return;
      if (ids.has(parsed.id as string)) filtered.push(`${loc.at(["steps", i, "id"])}: steps[${i}].id: duplicate step id ${show(parsed.id)}`);
      ids.add(parsed.id as string);
      steps.push(parsed as Pipeline["steps"][number]);
    });
  }
  if (filtered.length > 0 || !base) throw new PipelineError([...new Set(filtered)].join("\n"));

  const pipeline: Pipeline = { ...base, audit: AuditOptions.parse(base.audit ?? {}), steps };
  // Cross-checks with positions.
  const names = new Set(Object.keys(pipeline.sources));
  pipeline.steps.forEach((s, i) => {
    if (names.has(s.id)) filtered.push(`${loc.at(["steps", i, "id"])}: steps[${i}].id: ${show(s.id)} is already the name of a source`);
  });
  for (const [name, src] of Object.entries(pipeline.sources)) {
    if (src.unit && src.unit_column) filtered.push(`${loc.at(["sources", name, "unit_column"])}: sources.${name}: give either unit or unit_column, not both`);
    const hasQty = Object.values(src.columns).some((c) => (typeof c === "string" ? c : c.type) === "quantity");
    if (hasQty && !src.unit && !src.unit_column)
      filtered.push(`${loc.at(["sources", name])}: sources.${name}: has quantity columns but no unit; add unit: (${"kg, t, kt, Mt, piece"} …) or unit_column:`);
    if (src.unit_column && !(src.unit_column in src.columns))
      filtered.push(`${loc.at(["sources", name, "unit_column"])}: sources.${name}.unit_column: ${show(src.unit_column)} is not among the declared columns (${Object.keys(src.columns).join(", ")})`);
  }
  if (filtered.length > 0) throw new PipelineError(filtered.join("\n"));

  return {
    file: abs,
    dir: path.dirname(abs),
    sha256: createHash("sha256").update(bytes).digest("hex"),
    variables: vars,
    pipeline,
    locate: (p, key) => `${loc.at(p, key)}: ${pathText(key !== undefined ? [...p, key] : p)}`,
  };
}

export { pathText };
