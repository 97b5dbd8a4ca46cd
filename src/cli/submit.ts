import type { Command } from "commander";
import path from "node:path";
import { exitCodeOf, PipelineError } from "../errors.js";
import { loadPipeline, parseSet } from "../spec/load.js";
import { buildPlan } from "../plan/build.js";
import { planShards } from "../plan/shard.js";
import { catalogOf, protectedPaths } from "../run/runner.js";
import { checkTarget } from "../publish/rundir.js";
import { Catalog } from "../publish/catalog.js";
import { checkMem, checkName, checkTime, submit } from "../cluster/slurm.js";
import { collect, fail, parsePath, parseSize } from "./common.js";

export function registerSubmit(program: Command): void {
  program
    .command("submit")
    .description("run a pipeline as a sharded run on a Slurm cluster: a job array of N shards and a merge job that runs when all succeeded (DIR receives the merged run)")
    .argument("<file>", "the pipeline file (YAML)")
    .requiredOption("--slurm", "submit to Slurm with sbatch (the only scheduler supported)")
    .requiredOption("--shards <n>", "number of shards (job array tasks), 1 to 10000")
    .option("--out <dir>", "the merged run directory (the batch scripts and shard directories go to DIR.shards/)", parsePath)
    .option("--release <id>", "merge into the catalog as this release (--catalog, or catalog: in the pipeline file)")
    .option("--catalog <dir>", "the catalog folder of releases", parsePath)
    .option("--replace", "replace an existing --out (or release) when the merge publishes", false)
    .option("--shard-by <column>", "the key the shards split", "region")
    .option("--set <name=value>", "give a variable used as ${NAME} in the file (repeatable)", collect, [] as string[])
    .option("--partition <name>", "Slurm partition")
    .option("--account <name>", "Slurm account")
    .option("--time <limit>", "time limit of each job, e.g. 2:00:00")
    .option("--mem <size>", "memory per job, e.g. 8G (Slurm --mem)")
    .option("--cpus <n>", "CPUs per shard job (DuckDB and cohort threads follow it)", "1")
    .option("--merge-cpus <n>", "CPUs of the merge job (default: --cpus)")
    .option("--memory-limit <size>", "DuckDB memory limit in each job (below --mem), e.g. 6GB; beyond it DuckDB spills", parseSize)
    .option("--setup <line>", "a shell line run before cairn in each job, e.g. 'module load nodejs/20' (repeatable)", collect, [] as string[])
    .option("--dry-run", "print the batch scripts; write and submit nothing", false)
    .option("--json", "print what was submitted as JSON", false)
    .action(async (file: string, o: { slurm: boolean; shards: string; out?: string; release?: string; catalog?: string; replace: boolean; shardBy: string; set: string[];
      partition?: string; account?: string; time?: string; mem?: string; cpus: string; mergeCpus?: string; memoryLimit?: string; setup: string[]; dryRun: boolean; json: boolean }) => {
      try {
        const n = Number(o.shards);
        if (!/^\d+$/.test(o.shards.trim()) || n < 1 || n > 10000) throw new PipelineError(`--shards ${JSON.stringify(o.shards)}: expected a whole number of shards from 1 to 10000`);
        const count = (opt: string, v: string) => {
          if (!/^\d+$/.test(v.trim()) || Number(v) < 1 || Number(v) > 1024) throw new PipelineError(`${opt} ${JSON.stringify(v)}: expected a whole number of CPUs from 1 to 1024`);
          return Number(v);
        };
        const cpus = count("--cpus", o.cpus);
        const mergeCpus = o.mergeCpus === undefined ? cpus : count("--merge-cpus", o.mergeCpus);
        if (o.out && o.release) throw new PipelineError("--out and --release: the merged run goes to one of them");
        if (!o.out && !o.release) throw new PipelineError("give --out DIR (the merged run directory) or --release ID (into a catalog)");
        if (o.release) Catalog.checkId(o.release);
        // The whole pipeline is checked, and its shard plan made, before anything is submitted.
        const lp = loadPipeline(file, parseSet(o.set));
        const plan = await buildPlan(lp);
        const sp = await planShards(plan, o.shardBy);
        const catalog = catalogOf(lp, { release: o.release, catalog: o.catalog });
        const out = path.resolve(catalog ? path.join(catalog.dir, o.release!) : o.out!);
        if (!o.release) checkTarget(out, { replace: o.replace, protect: protectedPaths(lp) });
        const opts = {
          file: path.resolve(file), out, shards: n, by: o.shardBy, set: o.set, cpus, mergeCpus, memoryLimit: o.memoryLimit, setup: o.setup, replace: o.replace, name: lp.pipeline.name, cwd: process.cwd(),
          ...(o.partition ? { partition: checkName("--partition", o.partition) } : {}), ...(o.account ? { account: checkName("--account", o.account) } : {}),
          ...(o.time ? { time: checkTime(o.time) } : {}), ...(o.mem ? { mem: checkMem(o.mem) } : {}),
          ...(o.release ? { release: o.release, catalog: catalog!.dir } : {}),
        };
        const { scripts, submitted } = submit(opts, o.dryRun);
        const local = sp.steps.filter((x) => x.placement !== "merge").map((x) => x.id);
        if (o.json) {
          process.stdout.write(JSON.stringify(submitted ? { ...submitted, steps_in_shards: local } : { dry_run: true, scripts, steps_in_shards: local }) + "\n");
          return;
        }
        if (!submitted) {
          const work = `${out}.shards`;
          process.stdout.write(`# would write ${work}/shards.sbatch and ${work}/merge.sbatch and run:\n#   sbatch --parsable ${work}/shards.sbatch\n` +
            `#   sbatch --parsable --dependency=afterok:<array job id> --kill-on-invalid-dep=yes ${work}/merge.sbatch\n\n` +
            `# shards.sbatch\n${scripts.shards}\n# merge.sbatch\n${scripts.merge}`);
          return;
        }
        process.stdout.write(`submitted ${n} shard(s) of ${path.resolve(file)} by ${o.shardBy} as job array ${submitted.array_job} (tasks 0-${n - 1}), and the merge as job ${submitted.merge_job} (runs when every shard succeeded; cancelled if one fails)
  steps in the shards: ${local.join(", ")}
  merged run: ${out}
  work folder: ${submitted.work} (batch scripts, shard-K/ run directories, logs/)
follow it:
  cairn status ${out}
  squeue -j ${submitted.array_job},${submitted.merge_job}
  tail -f ${path.join(submitted.work, "logs")}/*.log
`);
      } catch (e) {
        fail(e, o.json, exitCodeOf(e));
      }
    });
}
