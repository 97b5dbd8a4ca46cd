/**
 * Fault injection for the hostile-input tests (never needed in normal use): CAIRN_FAULT names
 * one point of a run and what happens there, e.g.
 *   CAIRN_FAULT=after-source:production:append:/path/file.csv     (a file changes under the run)
 *   CAIRN_FAULT=after-step:stocks:exit                              (the process dies there, like kill -9)
 *   CAIRN_FAULT=before-publish:enospc                               (the disk fills up)
 *   CAIRN_FAULT=after-step:consumption:oom                          (the engine runs out of memory)
 *   CAIRN_FAULT=after-step:x:replace:/path/a.csv:/path/b.csv        (b is renamed over a)
 * Points: after-source:<name>, after-step:<id>, before-publish.
 */
import { appendFileSync, renameSync } from "node:fs";

export function fault(point: string): void {
  const spec = process.env.CAIRN_FAULT;
  if (!spec || !spec.startsWith(point + ":")) return;
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
    case "replace":
      renameSync(args[1]!, args[0]!);
      break;
    default:
      throw new Error(`CAIRN_FAULT: unknown action ${action}`);
  }
}
