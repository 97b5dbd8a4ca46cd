/**
 * The plan stage, between the pipeline file and the runner: every source and step becomes a
 * node with what it reads and what it produces (names, roles, key columns, typed columns),
 * declared by its kind without running. Building the plan checks the whole file as `run` will
 * see it: tables read exist earlier in the file, SQL parses and binds over the declared
 * tables, names do not collide. `check` and `run` build the same plan, so a file that passes
 * `check` is never refused by `run` as an invalid pipeline.
 */
import { PipelineError } from "../errors.js";
import { closest, type LoadedPipeline } from "../spec/load.js";
import type { SourceT, StepBase } from "../spec/schema.js";
import { stepKind } from "../steps/registry.js";
import type { OutputDecl, PlanContext, ReadDecl, StepKind, TableSchema } from "../steps/types.js";
import { sourceSchema } from "./sources.js";
import { SqlSandbox } from "./sandbox.js";
import { exporterFor } from "../publish/exporters.js";

/** Names of the tool's own tables and files in a run directory; no step may produce them. */
export const RESERVED_NAMES = ["rejects", "audit", "manifest", "dictionary", "report", "run", "plan", "inputs"] as const;
/** Prefix of the tool's internal tables. */
export const INTERNAL_PREFIX = "__";

export interface SourceNode {
  name: string;
  source: SourceT;
  schema: TableSchema;
  /** Read as a small table that configures a step (loaded whole by `check`, with file and line). */
  config: boolean;
  /** Steps that read it. */
  readBy: string[];
}

export interface StepNode {
  index: number;
  id: string;
  kind: StepKind;
  step: StepBase;
  reads: ReadDecl[];
  outputs: OutputDecl[];
}

export interface Plan {
  lp: LoadedPipeline;
  sources: SourceNode[];
  steps: StepNode[];
  /** Every table known to the run: sources and step outputs. */
  schemas: Map<string, TableSchema>;
  /** Table name → the step id that produces it (sources absent). */
  producer: Map<string, string>;
  /** Tables read by exports and the data dictionary's labels (loaded even when no step reads them). */
  extraReads: string[];
}

function owner(plan: { producer: Map<string, string> }, name: string, sources: Set<string>): string {
  if (sources.has(name)) return `source ${name}`;
  return `step ${plan.producer.get(name)}`;
}

export async function buildPlan(lp: LoadedPipeline): Promise<Plan> {
  const p = lp.pipeline;
  const sandbox = await SqlSandbox.open();
  try {
    const schemas = new Map<string, TableSchema>();
    const producer = new Map<string, string>();
    const sourceNames = new Set(Object.keys(p.sources));
    const sources: SourceNode[] = [];
    for (const [name, src] of Object.entries(p.sources)) {
      if (name.startsWith(INTERNAL_PREFIX) || (RESERVED_NAMES as readonly string[]).includes(name)) {
        throw new PipelineError(`${lp.locate(["sources", name])}: the name ${JSON.stringify(name)} is reserved for the tool's own tables (${RESERVED_NAMES.join(", ")}, and names starting with ${INTERNAL_PREFIX}); choose another`);
      }
      const schema = sourceSchema(name, src);
      if (src.filter) await sandbox.checkFilter(src.filter, schema.columns, lp.locate(["sources", name, "filter"]));
      schemas.set(name, schema);
      sources.push({ name, source: src, schema, config: false, readBy: [] });
    }
    const steps: StepNode[] = [];
    for (const [i, step] of p.steps.entries()) {
      const kind = stepKind(step.kind)!;
      const at = (option?: string) => lp.locate(["steps", i, ...(option ? [option] : [])]);
      const reads = kind.reads(step as never, p);
      for (const r of reads) {
        if (schemas.has(r.table)) continue;
        const later = p.steps.slice(i + 1).find((x) => x.id === r.table);
        const near = closest(r.table, [...schemas.keys()]);
        throw new PipelineError(`${at(r.option)}: no table ${JSON.stringify(r.table)} ${later ? `yet: it is produced by a later step (${later.id}); move this step after it` : `among the sources and the tables of earlier steps${near ? `; did you mean ${JSON.stringify(near)}?` : ""} (known: ${[...schemas.keys()].join(", ")})`}`);
      }
      const ctx: PlanContext = {
        pipeline: p,
        schemaOf(table, option) {
          const sc = schemas.get(table);
          if (!sc) throw new PipelineError(`${at(option)}: no table ${JSON.stringify(table)}`);
          return sc;
        },
        async bind(sql, inputs, option) {
          await sandbox.checkQuery(sql, inputs, at(option));
          const tables: Record<string, TableSchema> = {};
          for (const t of inputs) tables[t] = ctx.schemaOf(t, "inputs");
          return sandbox.bind(sql, tables, at(option));
        },
        fail(option, message): never {
          throw new PipelineError(`${at(option)}: ${message}`);
        },
      };
      const outputs = await kind.outputs(ctx, step as never);
      const pub = step.publish;
      if (pub && typeof pub === "object") {
        const main = outputs.find((o) => o.role === "main")!;
        const cols = main.columns.map((c) => c.name);
        const bad = (pub.partition_by ?? []).filter((c) => !cols.includes(c));
        if (bad.length) ctx.fail("publish", `partition_by ${bad.join(", ")}: not ${bad.length > 1 ? "columns" : "a column"} of ${main.name} (its columns: ${cols.join(", ")})`);
      }
      for (const o of outputs) {
        if (o.name.startsWith(INTERNAL_PREFIX) || (RESERVED_NAMES as readonly string[]).includes(o.name)) {
          throw new PipelineError(`${at("id")}: step ${step.id} would produce the table ${JSON.stringify(o.name)}, a name reserved for the tool's own tables and files (${RESERVED_NAMES.join(", ")}, and names starting with ${INTERNAL_PREFIX}); choose another id`);
        }
        if (schemas.has(o.name)) {
          throw new PipelineError(`${at("id")}: step ${step.id} would produce the table ${JSON.stringify(o.name)}, which ${owner({ producer }, o.name, sourceNames)} already ${sourceNames.has(o.name) ? "is" : "produces"}; choose another id`);
        }
        schemas.set(o.name, o);
        producer.set(o.name, step.id);
      }
      for (const r of reads) {
        const sn = sources.find((x) => x.name === r.table);
        if (sn) {
          sn.readBy.push(step.id);
          if (r.config) sn.config = true;
        }
      }
      steps.push({ index: i, id: step.id, kind, step, reads, outputs });
    }
    const extraReads = checkExportsAndLabels(lp, schemas, producer, steps, sources);
    return { lp, sources, steps, schemas, producer, extraReads };
  } finally {
    sandbox.close();
  }
}


/** Exports name published tables and their columns; code and label tables exist with their columns. */
function checkExportsAndLabels(lp: LoadedPipeline, schemas: Map<string, TableSchema>, producer: Map<string, string>, steps: StepNode[], sources: SourceNode[]): string[] {
  const p = lp.pipeline;
  const reads: string[] = [];
  const fail = (at: (string | number)[], m: string): never => {
    throw new PipelineError(`${lp.locate(at)}: ${m}`);
  };
  const markConfig = (t: string) => {
    reads.push(t);
    const src = sources.find((x) => x.name === t);
    if (src) src.config = true;
  };
  (p.exports ?? []).forEach((e, i) => {
    const step = producer.get(e.table);
    const node = steps.find((n) => n.id === step);
    const decl = node?.outputs.find((o) => o.name === e.table);
    if (!decl) fail(["exports", i, "table"], `${JSON.stringify(e.table)} is not a table of a step (known: ${[...producer.keys()].join(", ")})`);
    if (decl!.streamed || node!.step.publish === false) fail(["exports", i, "table"], `${e.table} is not published as a table (streamed or publish: false)`);
    exporterFor(e.format).check(e, {
      columns: new Map(decl!.columns.map((c) => [c.name, c.type])),
      schemas,
      fail: (k, m) => fail(["exports", i, k], m),
      reads: markConfig,
    });
  });
  for (const [col, table] of Object.entries(p.labels ?? {})) {
    const ts = schemas.get(table);
    if (!ts) fail(["labels", col], `no table ${JSON.stringify(table)} among the sources and the tables of the steps`);
    const names = ts!.columns.map((c) => c.name);
    if (!names.includes(col) && !names.includes("code")) fail(["labels", col], `table ${table} has neither ${col} nor code (it has ${names.join(", ")})`);
    if (!names.includes("label") && !names.includes("name")) fail(["labels", col], `table ${table} has neither label nor name (it has ${names.join(", ")})`);
    markConfig(table);
  }
  return reads;
}
