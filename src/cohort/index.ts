/** The numeric core: lifetime distributions, discretisation, batched cohort models. No I/O. */
export * from "./distributions/index.js";
export * from "./discretise.js";
export * from "./kernels.js";
export * from "./models.js";
export * from "./lifetime-spec.js";
export * from "./special.js";
export * from "./interpolate.js";
