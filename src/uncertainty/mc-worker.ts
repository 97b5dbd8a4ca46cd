/** Worker thread of the Monte Carlo pool: holds one job at a time and computes its chunks. */
import { parentPort } from "node:worker_threads";
import { computeChunk } from "./mc-chunk.js";
import type { McChunk, McChunkResult, McJob } from "./mc-types.js";

let job: McJob | null = null;

function buffers(r: McChunkResult): ArrayBuffer[] {
  const out: ArrayBuffer[] = [];
  const add = (a: Float64Array | null | undefined) => {
    if (a && a.buffer instanceof ArrayBuffer && !out.includes(a.buffer)) out.push(a.buffer);
  };
  for (const s of r.stats) if (s) [s.mean, s.sd, ...s.quantiles].forEach(add);
  for (const s of r.sobol) if (s) Object.values(s).forEach(add);
  add(r.totals);
  return out;
}

parentPort!.on("message", (m: { type: "job"; job: McJob } | { type: "chunk"; chunk: McChunk }) => {
  if (m.type === "job") {
    job = m.job;
    return;
  }
  try {
    const r = computeChunk(job!, m.chunk);
    parentPort!.postMessage({ ok: true, result: r }, buffers(r));
  } catch (e) {
    parentPort!.postMessage({ ok: false, error: (e as Error).message });
  }
});
