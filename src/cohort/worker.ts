/** Worker thread: runs one cohort task in place in the shared arena, with the WebAssembly kernels. */
import { parentPort, workerData } from "node:worker_threads";
import { CohortGroup, composition, inflowDriven, stockDriven, type ModelResult, type OutputBuffers } from "./models.js";
import { buffersOf, type ArenaRef, type ArenaTask, type TaskExtras } from "./pool.js";
import { arenaView, attachArena, registerPanels } from "./wasm/index.js";

attachArena((workerData as { arena: WebAssembly.Memory }).arena);
const view = (r: ArenaRef) => arenaView(r[0], r[1]);

parentPort!.on("message", (t: ArenaTask) => {
  try {
    const P = view(t.P);
    registerPanels(P, view(t.panels));
    const g = CohortGroup.fromMatrices(t.T, view(t.S), P, t.rate, t.St ? view(t.St) : undefined);
    const out: OutputBuffers = { outflow: view(t.out.outflow), stock: view(t.out.stock), stockChange: view(t.out.stockChange) };
    if (t.out.inflow) out.inflow = view(t.out.inflow);
    const values = view(t.values);
    const i = t.initial;
    const initial = i ? { stock0: view(i.stock0), stock: view(i.stock), outflow: view(i.outflow), ageSum: view(i.ageSum), outAgeSum: view(i.outAgeSum), tooOld: view(i.tooOld) } : null;
    let r: ModelResult;
    if (t.kind === "inflow") r = inflowDriven(g, values, t.n, { indicators: t.indicators, initial, out });
    else if (t.kind === "stock") r = stockDriven(g, values, t.n, { indicators: t.indicators, initial, clamp: t.clamp, out });
    else r = composition(g, values, t.n, view(t.content!), t.M!, null, out);
    // A model that made its own arrays (first-order decay does) is copied into the arena results.
    for (const f of ["inflow", "outflow", "stock", "stockChange"] as const) {
      const dst = out[f];
      if (dst && r[f] !== dst) dst.set(r[f]);
    }
    const extras: TaskExtras = { meanAgeStock: r.meanAgeStock, meanAgeOutflow: r.meanAgeOutflow, unmet: r.unmet };
    parentPort!.postMessage({ ok: true, result: extras }, buffersOf(extras));
  } catch (e) {
    parentPort!.postMessage({ ok: false, error: (e as Error).message });
  }
});
