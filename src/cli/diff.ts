import type { Command } from "commander";
import path from "node:path";
import { InvalidArgumentError } from "commander";
import { exitCodeOf, PipelineError } from "../errors.js";
import { Session } from "../engine/session.js";
import { ident, lit } from "../engine/sql.js";
import { readPrevious } from "../run/reuse.js";
import { revisions, revisionsTable } from "../publish/revisions.js";
import type { TableSchema } from "../steps/types.js";
import { fail } from "./common.js";

function parseTop(v: string): number {
  if (!/^\d+$/.test(v) || Number(v) < 1) throw new InvalidArgumentError(`expected a whole number ≥ 1, got ${JSON.stringify(v)}`);
  return Number(v);
}

export function registerDiff(program: Command): void {
  program
    .command("diff")
    .description("the largest revisions between two run directories (A the earlier, B the later), per published table, with their causes as far as the manifests tell")
    .argument("<a>", "the earlier run directory")
    .argument("<b>", "the later run directory")
    .option("--table <name>", "only this table")
    .option("--top <n>", "how many revisions per table, largest first (default 10)", parseTop, 10)
    .option("--json", "print the revisions as JSON", false)
    .action(async (a: string, b: string, o: { table?: string; top: number; json: boolean }) => {
      try {
        const A = readPrevious(a);
        const B = readPrevious(b);
        if (!A) throw new PipelineError(`${a}: not a completed cairn run directory (no manifest.json with status ok)`);
        if (!B) throw new PipelineError(`${b}: not a completed cairn run directory (no manifest.json with status ok)`);
        const tables = [...new Set(B.manifest.outputs.filter((x) => x.step && x.role !== "revisions" && x.role !== "changes" && x.role !== "input" && !x.file.includes("_by_cohort")).map((x) => x.table))]
          .filter((t) => !o.table || t === o.table);
        if (o.table && !tables.length) throw new PipelineError(`--table ${o.table}: ${b} publishes no such table (it has ${[...new Set(B.manifest.outputs.filter((x) => x.step).map((x) => x.table))].join(", ")})`);
        const s = await Session.open({ threads: 2 });
        const result: Record<string, unknown[]> = {};
        try {
          const srcA = new Map((A.manifest.sources ?? []).map((x) => [x.name, x.fingerprint]));
          const changedSources = (B.manifest.sources ?? []).filter((x) => srcA.get(x.name) !== x.fingerprint).map((x) => x.name);
          const stepsA = new Map((A.manifest.steps ?? []).map((x) => [x.id, x]));
          for (const t of tables) {
            const filesA = A.manifest.outputs.filter((x) => x.table === t && (x.format ?? "parquet") === "parquet").map((x) => path.join(A.dir, x.file));
            if (!filesA.length) continue;
            const filesB = B.manifest.outputs.filter((x) => x.table === t && (x.format ?? "parquet") === "parquet").map((x) => path.join(B.dir, x.file));
            const step = B.manifest.steps?.find((x) => x.outputs.some((y) => y.name === t));
            await s.run(`CREATE OR REPLACE VIEW ${ident(t)} AS SELECT * FROM read_parquet([${filesB.map(lit).join(", ")}])`);
            const cols = await s.columns(t);
            const keys = ((step?.outputs.find((y) => y.name === t) as { keys?: string[] } | undefined)?.keys ?? []).filter((k) => cols.some((c) => c.name === k));
            const schema: TableSchema = { keys, columns: cols.map((c) => ({ name: c.name, type: c.type, description: "" })) };
            const methodChanged = Boolean(step && stepsA.get(step.id)?.method_fingerprint !== (step as { method_fingerprint?: string }).method_fingerprint);
            // Sources upstream of the table's step (from the manifest's reads), among those whose files changed.
            const up = new Set<string>();
            const walk = (id: string, seen = new Set<string>()) => {
              if (seen.has(id)) return;
              seen.add(id);
              const st = B.manifest.steps?.find((x) => x.id === id) as { reads?: string[] } | undefined;
              for (const r of st?.reads ?? []) {
                const producer = B.manifest.steps?.find((x) => x.outputs.some((y) => y.name === r));
                if (producer) walk(producer.id, seen);
                else up.add(r);
              }
            };
            if (step) walk(step.id);
            await revisions(s, { table: t, step: step?.id ?? t, schema, previousFiles: filesA, methodChanged, changedSources: [], coarseSources: changedSources.filter((x) => up.has(x)) });
            result[t] = await s.all(`SELECT * FROM ${ident(revisionsTable(t))} ORDER BY abs(coalesce(revision, 0)) DESC, variable LIMIT ${o.top}`);
          }
        } finally {
          s.close();
        }
        if (o.json) {
          process.stdout.write(JSON.stringify(result) + "\n");
          return;
        }
        for (const [t, rows] of Object.entries(result)) {
          process.stdout.write(`${t}: ${rows.length ? `the ${rows.length} largest revision(s)` : "no revision"}\n`);
          for (const r of rows as Record<string, unknown>[]) {
            const keys = Object.entries(r).filter(([k]) => !["variable", "previous", "new", "revision", "relative_revision", "cause", "sources"].includes(k)).map(([k, v]) => `${k}=${v}`).join(", ");
            const rel = r.relative_revision == null ? "" : ` (${(100 * Number(r.relative_revision)).toFixed(2)} %)`;
            process.stdout.write(`  ${keys} ${r.variable}: ${r.previous ?? "—"} → ${r.new ?? "—"}${rel}  ${r.cause}${r.sources ? ` (${r.sources})` : ""}\n`);
          }
        }
      } catch (e) {
        fail(e, o.json, exitCodeOf(e));
      }
    });
}
