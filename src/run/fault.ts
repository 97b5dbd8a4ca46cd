/**
 * Fault injection for the hostile-input tests (never needed in normal use): CAIRN_FAULT names
 * one point of a run and what happens there, e.g.
 *   CAIRN_FAULT=after-source:production:append:/path/file.csv     (a file changes under the run)
 *   CAIRN_FAULT=after-step:stocks:exit                              (the process dies there, like kill -9)
 *   CAIRN_FAULT=before-publish:enospc                               (the disk fills up)
 *   CAIRN_FAULT=after-step:consumption:oom                          (the engine runs out of memory)
 *   CAIRN_FAULT=after-step:x:replace:/path/a.csv:/path/b.csv        (b is renamed over a)
 *   CAIRN_FAULT=after-step:stocks:fail                              (the run stops with bad input, exit 3)
 * Points: after-source:<name>, after-step:<id>, before-publish. With CAIRN_FAULT_SHARD=K the
 * fault happens only in shard K of a sharded run (`--shard K/N`), never in other runs.
 */
import { appendFileSync, renameSync } from "node:fs";
import { DataError } from "../errors.js";

export function fault(point: string, shard?: number): void {
  const spec = process.env.CAIRN_FAULT;
  if (!spec || !spec.startsWith(point + ":")) return;
  const only = process.env.CAIRN_FAULT_SHARD;
  if (only !== undefined && only !== "" && String(shard) !== only.trim()) return;
  const [action, ...args] = spec.slice(point.length + 1).split(":");
  switch (action) {
    case "exit":
      process.kill(process.pid, "SIGKILL");
      break;
    case "enospc":
      throw Object.assign(new Error(`ENOSPC: no space left on device, write (injected at ${point})`), { code: "ENOSPC" });
    case "oom":
      throw new Error(`Out of Memory Error: could not allocate block of size 256.0 MiB (injected at ${point})`);
    case "append":
      appendFileSync(args.join(":"), "Z,c1,2003,1\n");
      break;
    case "fail":
      throw new DataError(`injected failure at ${point}${shard === undefined ? "" : ` in shard ${shard}`} (CAIRN_FAULT)`);
    case "replace":
      renameSync(args[1]!, args[0]!);
      break;
    default:
      throw new Error(`CAIRN_FAULT: unknown action ${action}`);
  }
}
