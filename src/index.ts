/** The library API: what `import … from "cairn"` gives. */
export { loadPipeline, parseSet, type LoadedPipeline } from "./spec/load.js";
export { pipelineJsonSchema } from "./spec/json-schema.js";
export type { Pipeline, SourceT as Source, StepBase } from "./spec/schema.js";
export { runPipeline, defaultRunDir, type RunOptions, type RunReport } from "./run/runner.js";
export { checkPipeline } from "./run/check.js";
export { Session, type SessionOptions } from "./engine/session.js";
export { readColumns, writeColumns } from "./engine/handoff.js";
export { STEP_KINDS, stepKind } from "./steps/registry.js";
export type { StepKind, StepContext, TableInfo } from "./steps/types.js";
export { CairnError, PipelineError, DataError, AuditFailure, EXIT } from "./errors.js";
export * from "./cohort/index.js";
export { generateSynthetic } from "./data/synth.js";
export { readRunTable } from "./publish/arrow.js";
export { EXPORTERS, type Exporter, type ExportContext, type ExportCheck } from "./publish/exporters.js";
export { renderReport, type ReportOptions } from "./report/report.js";
