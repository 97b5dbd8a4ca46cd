/** Worker thread: runs one cohort task with the WebAssembly kernels. */
import { parentPort } from "node:worker_threads";
import { CohortGroup, composition, inflowDriven, stockDriven, type ModelResult } from "./models.js";
import { buffersOf, type CohortTask } from "./pool.js";

parentPort!.on("message", (t: CohortTask) => {
  try {
    const g = CohortGroup.fromMatrices(t.T, t.S, t.P, t.rate);
    let r: ModelResult;
    if (t.kind === "inflow") r = inflowDriven(g, t.values, t.n, { indicators: t.indicators, initial: t.initial ?? null, out: t.out });
    else if (t.kind === "stock") r = stockDriven(g, t.values, t.n, { indicators: t.indicators, initial: t.initial ?? null, clamp: t.clamp, out: t.out });
    else r = composition(g, t.values, t.n, t.content!, t.M!, null, t.out);
    const { stockTarget: _t, ...back } = r; // the caller has the target already
    // The task's own input buffers go back too, for reuse.
    const result = { ...back, inputs: { values: r.inflow === t.values || t.kind === "stock" ? undefined : t.values, S: t.S, P: t.P, content: t.content, initial: t.initial } };
    parentPort!.postMessage({ ok: true, result }, buffersOf(result));
  } catch (e) {
    parentPort!.postMessage({ ok: false, error: (e as Error).message });
  }
});
