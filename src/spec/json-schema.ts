import { z } from "zod";
import { pipelineJsonSchemaZod } from "./schema.js";

/** JSON Schema of what users write (the input side of the zod schemas). */
export function pipelineJsonSchema(): Record<string, unknown> {
  const js = z.toJSONSchema(pipelineJsonSchemaZod(), { io: "input", unrepresentable: "any" }) as Record<string, unknown>;
  return { ...js, title: "cairn pipeline file", $id: "https://cairn.invalid/pipeline.schema.json" };
}
