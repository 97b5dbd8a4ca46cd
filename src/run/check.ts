/** `cairn check`: the file is valid, every source exists and has its declared columns; nothing runs. */
import { Session } from "../engine/session.js";
import { checkColumns, fileColumns, sourceFiles } from "../sources/load.js";
import { stepKind } from "../steps/registry.js";
import type { LoadedPipeline } from "../spec/load.js";

export async function checkPipeline(lp: LoadedPipeline): Promise<{ sources: { name: string; files: number; columns: string[] }[]; steps: { id: string; kind: string; reads: string[] }[] }> {
  const s = await Session.open({ threads: 1 });
  try {
    const sources = [];
    for (const [name, src] of Object.entries(lp.pipeline.sources)) {
      const { files, format } = await sourceFiles(s, name, src, lp.dir);
      await checkColumns(s, name, src, files, format);
      sources.push({ name, files: files.length, columns: await fileColumns(s, src, files, format) });
    }
    const steps = lp.pipeline.steps.map((st) => ({ id: st.id, kind: st.kind, reads: stepKind(st.kind)!.reads(st as never) }));
    return { sources, steps };
  } finally {
    s.close();
  }
}
