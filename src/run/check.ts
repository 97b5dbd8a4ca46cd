/**
 * `cairn check`: everything `run` checks before it computes, without computing. The plan (the
 * file, its SQL bound over the declared tables, names and collisions), every source's files and
 * declared columns, and the small tables that configure steps (lifetimes, content, concordance,
 * curves, groups, anchors) loaded whole and checked with file and line. A file that passes
 * `check` is never refused by `run` as an invalid pipeline (exit 2).
 */
import { Session } from "../engine/session.js";
import { Exact } from "../engine/sql.js";
import { AuditLog } from "../audit/log.js";
import { checkColumns, checkNotEmpty, fileColumns, initRejects, loadSource, sourceFiles } from "../sources/load.js";
import type { StepContext, TableInfo } from "../steps/types.js";
import type { LoadedPipeline } from "../spec/load.js";
import { buildPlan } from "../plan/build.js";
import { CarryStore } from "../steps/cohort-model/carry.js";
import { Progress } from "./progress.js";
import { massFactor } from "../units.js";
import { defaultSettings } from "./runner.js";

export interface CheckReport {
  sources: { name: string; files: number; columns: string[]; config: boolean; rows?: number }[];
  steps: { id: string; kind: string; reads: string[]; outputs: { name: string; role: string }[] }[];
}

export async function checkPipeline(lp: LoadedPipeline): Promise<CheckReport> {
  const plan = await buildPlan(lp);
  const s = await Session.open({ threads: 1 });
  try {
    const tables = new Map<string, TableInfo>();
    const ctx: StepContext = {
      session: s, pipeline: lp.pipeline, exact: new Exact(massFactor(lp.pipeline.base_unit, "g")), dir: lp.dir, outputDir: "",
      audits: new AuditLog(s, lp.pipeline.base_unit), progress: new Progress(false), tables,
      requireTable(name) {
        const t = tables.get(name);
        if (!t) throw new Error(`no table ${name}`);
        return t;
      },
      async columnsOf(name) {
        return (await s.columns(name)).map((c) => c.name);
      },
      streamed() {},
      carry: new CarryStore(),
      settings: defaultSettings(),
    };
    await initRejects(s);
    const sources: CheckReport["sources"] = [];
    for (const node of plan.sources) {
      const { files, format } = await sourceFiles(s, node.name, node.source, lp.dir);
      await checkColumns(s, node.name, node.source, files, format);
      await checkNotEmpty(s, node.name, node.source, files, format);
      const entry: CheckReport["sources"][number] = { name: node.name, files: files.length, columns: await fileColumns(s, node.source, files, format), config: node.config };
      if (node.config) {
        // Small tables are read whole, with the same rules (and reject limits) as in a run.
        const r = await loadSource(s, lp.pipeline, node.name, node.source, lp.dir, { located: true });
        tables.set(node.name, { name: node.name, keys: node.schema.keys, publish: false });
        entry.rows = r.rows_loaded;
      }
      sources.push(entry);
    }
    for (const node of plan.steps) await node.kind.check?.(ctx, node.step as never);
    return {
      sources,
      steps: plan.steps.map((n) => ({ id: n.id, kind: n.kind.kind, reads: n.reads.map((r) => r.table), outputs: n.outputs.map((o) => ({ name: o.name, role: o.role })) })),
    };
  } finally {
    s.close();
  }
}
