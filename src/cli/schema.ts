import type { Command } from "commander";
import { pipelineJsonSchema } from "../spec/json-schema.js";

export function registerSchema(program: Command): void {
  program
    .command("schema")
    .description("print the JSON Schema of pipeline files (for editors), generated from the validation schemas")
    .action(() => {
      process.stdout.write(JSON.stringify(pipelineJsonSchema(), null, 2) + "\n");
    });
}
