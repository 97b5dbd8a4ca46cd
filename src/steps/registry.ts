/** Step-kind registry: adding a kind is adding a file and one line here. */
import { z } from "zod";
import { Publish, StepId } from "../spec/common.js";
import type { StepKind } from "./types.js";
import { concordanceStep } from "./concordance.js";
import { apparentConsumptionStep } from "./apparent-consumption.js";
import { aggregateStep } from "./aggregate.js";
import { sqlStep } from "./sql.js";
import { cohortModelStep } from "./cohort-model/index.js";
import { yearlyPathStep } from "./yearly-path.js";

export const STEP_KINDS: readonly StepKind[] = [
  concordanceStep,
  apparentConsumptionStep,
  aggregateStep,
  sqlStep,
  cohortModelStep,
  yearlyPathStep,
] as unknown as StepKind[];

export function stepKind(kind: string): StepKind | undefined {
  return STEP_KINDS.find((k) => k.kind === kind);
}

/** The full schema of one step of a kind: id, kind, publish and the kind's options. */
export function stepSchemaFor(kind: string): z.ZodObject {
  const k = stepKind(kind);
  if (!k) throw new Error(`unknown step kind ${kind}`);
  return z
    .object({
      id: StepId.describe("the step's id; also the name of its output table"),
      kind: z.literal(kind),
      publish: Publish.optional(),
      ...k.options.shape,
    })
    .strict()
    .describe(k.summary);
}
