import type { Command } from "commander";
import { existsSync } from "node:fs";
import path from "node:path";
import { exitCodeOf } from "../errors.js";
import { loadPipeline, parseSet } from "../spec/load.js";
import { buildPlan } from "../plan/build.js";
import { fingerprints } from "../plan/fingerprint.js";
import { Session } from "../engine/session.js";
import { InputWatch } from "../sources/verify.js";
import { hashInputs, TOOL_VERSION } from "../run/runner.js";
import { readPrevious, reusableSteps } from "../run/reuse.js";
import { Catalog, INDEX_FILE } from "../publish/catalog.js";
import { collect, fail } from "./common.js";
import { describeMode, planShards } from "../plan/shard.js";

/** A run directory, or a catalog folder (its latest release). */
function previousDir(dir: string): string | null {
  if (existsSync(path.join(dir, INDEX_FILE))) return new Catalog(dir).latestDir();
  return dir;
}

export function registerPlan(program: Command): void {
  program
    .command("plan")
    .description("print the plan: every source and step with what it reads and produces, its fingerprint, and (with --against) which steps would be re-used")
    .argument("<file>", "the pipeline file (YAML)")
    .option("--set <name=value>", "give a variable used as ${NAME} in the file (repeatable)", collect, [] as string[])
    .option("--against <dir>", "a run directory or a catalog (its latest release): which steps are unchanged since")
    .option("--json", "print the plan as JSON", false)
    .option("--shard-by <column>", "also show how a sharded run by this key splits: which steps run in the shards, at the merge, or both, and how each source is cut")
    .action(async (file: string, o: { set: string[]; against?: string; json: boolean; shardBy?: string }) => {
      try {
        const lp = loadPipeline(file, parseSet(o.set));
        const plan = await buildPlan(lp);
        const s = await Session.open({ threads: 1 });
        let prints;
        try {
          prints = fingerprints(plan, TOOL_VERSION, await hashInputs(s, lp, plan, new InputWatch()));
        } finally {
          s.close();
        }
        const prevDir = o.against ? previousDir(o.against) : null;
        const prev = readPrevious(prevDir);
        if (o.against && !prev) throw new Error(`--against ${o.against}: no completed run there (no manifest.json with status ok)`);
        const reused = prev ? reusableSteps(plan, prints, prev) : new Set<string>();
        const sp = o.shardBy ? await planShards(plan, o.shardBy) : null;
        const out = {
          pipeline: lp.pipeline.name, file: lp.file,
          ...(prev ? { against: prev.dir } : {}),
          sources: plan.sources.map((n) => ({ name: n.name, path: n.source.path, config: n.config, read_by: n.readBy, fingerprint: prints.get(n.name)!.fingerprint,
            ...(prev ? { changed: prev.manifest.sources?.find((x) => x.name === n.name)?.fingerprint !== prints.get(n.name)!.fingerprint } : {}),
            ...(sp ? { shards: sp.sources.find((x) => x.name === n.name)!.mode } : {}) })),
          steps: plan.steps.map((n) => ({
            id: n.id, kind: n.kind.kind, reads: n.reads.map((r) => ({ table: r.table, option: r.option, config: Boolean(r.config) })),
            outputs: n.outputs.map((x) => ({ name: x.name, role: x.role, keys: x.keys, columns: x.columns.map((c) => `${c.name} ${c.type}`) })),
            fingerprint: prints.get(n.id)!.fingerprint, method_fingerprint: prints.get(n.id)!.method,
            ...(prev ? { reused: reused.has(n.id) } : {}),
            ...(sp ? (({ placement, reason }) => ({ shards: { placement, reason } }))(sp.steps.find((x) => x.id === n.id)!) : {}),
          })),
          ...(sp ? { shard_by: sp.by } : {}),
        };
        if (o.json) {
          process.stdout.write(JSON.stringify(out, null, 2) + "\n");
          return;
        }
        const w = process.stdout;
        w.write(`plan of ${file} (pipeline ${lp.pipeline.name})${prev ? `, against ${prev.dir}` : ""}${sp ? `, sharded by ${sp.by}` : ""}\n\nsources\n`);
        for (const x of out.sources) {
          w.write(`  ${x.name.padEnd(20)} ${x.fingerprint.slice(0, 12)}  ${x.config ? "small table, read whole by check" : "data"}; read by ${x.read_by.join(", ") || "no step"}${"changed" in x ? (x.changed ? "  CHANGED" : "  unchanged") : ""}\n`);
          if (sp) w.write(`      shards   ${describeMode(sp.sources.find((s) => s.name === x.name)!.mode, sp.by)}\n`);
        }
        w.write("\nsteps, in order\n");
        for (const x of out.steps) {
          w.write(`  ${x.id} (${x.kind})  ${x.fingerprint.slice(0, 12)}${"reused" in x ? (x.reused ? "  would be re-used" : "  would be computed") : ""}\n`);
          w.write(`      reads    ${x.reads.map((r) => `${r.table}${r.config ? " (small table)" : ""}`).join(", ")}\n`);
          if (sp) {
            const st = sp.steps.find((y) => y.id === x.id)!;
            w.write(`      runs     ${st.placement === "shards" ? "in the shards" : st.placement === "both" ? "in the shards and again at the merge" : "at the merge"}: ${st.reason}\n`);
          }
          for (const t of x.outputs) w.write(`      ${t.role === "main" ? "produces" : "        "} ${t.name} [${t.keys.join(", ")}]: ${t.columns.join(", ")}\n`);
        }
      } catch (e) {
        fail(e, o.json, exitCodeOf(e) === 1 && /^--against/.test((e as Error).message) ? 2 : exitCodeOf(e));
      }
    });
}
