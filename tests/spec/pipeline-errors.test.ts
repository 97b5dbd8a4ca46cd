import { describe, expect, it } from "vitest";
import path from "node:path";
import { loadPipeline } from "../../src/spec/load.js";
import { PipelineError } from "../../src/errors.js";
import { BASIC_SOURCES, tmp, write } from "../helpers.js";
import { buildPlan } from "../../src/plan/build.js";

/** The message of the first error of loading and planning the file (the plan checks what needs the tables' schemas). */
async function planErrorOf(yaml: string): Promise<string> {
  const dir = tmp();
  write(dir, { "p.yaml": yaml });
  try {
    await buildPlan(loadPipeline(path.join(dir, "p.yaml")));
  } catch (e) {
    expect(e).toBeInstanceOf(PipelineError);
    return (e as Error).message.replaceAll(dir + path.sep, "");
  }
  throw new Error("expected an error");
}

function errorOf(yaml: string, sets: Record<string, string> = {}): string {
  const dir = tmp();
  write(dir, { "p.yaml": yaml });
  try {
    loadPipeline(path.join(dir, "p.yaml"), sets);
  } catch (e) {
    expect(e).toBeInstanceOf(PipelineError);
    return (e as Error).message.replaceAll(dir + path.sep, "");
  }
  throw new Error("expected an error");
}

const STEP = `
steps:
  - id: consumption
    kind: apparent-consumption
    production: production
    trade: trade
`;

describe("broken pipeline files give file:line:col, key, value and what is accepted", () => {
  it("1. unknown step kind lists the known kinds and the close match", () => {
    const m = errorOf(`name: t\n${BASIC_SOURCES}\nsteps:\n  - id: c\n    kind: apparent-consumptoin\n    production: production\n    trade: trade\n`);
    expect(m).toContain("p.yaml:25:11");
    expect(m).toContain('unknown step kind "apparent-consumptoin"; did you mean "apparent-consumption"?');
    expect(m).toContain("known kinds: concordance, apparent-consumption, aggregate, sql, cohort-model");
  });

  it("2. misspelt step option suggests the close key", () => {
    const m = errorOf(`name: t\n${BASIC_SOURCES}${STEP}    mirrorfill: true\n`);
    expect(m).toMatch(/p\.yaml:28:5: steps\[0\]\.mirrorfill: unknown key "mirrorfill"; did you mean "mirror_fill"\?/);
  });

  it("3. misspelt top-level key", () => {
    const m = errorOf(`name: t\nbase_unt: t\n${BASIC_SOURCES}${STEP}`);
    expect(m).toContain('p.yaml:2:1: base_unt: unknown key "base_unt"; did you mean "base_unit"?');
  });

  it("4. bad enum value names the value and the accepted ones", () => {
    const m = errorOf(`name: t\n${BASIC_SOURCES}${STEP}    negative: drop\n`);
    expect(m).toContain('p.yaml:28:15: steps[0].negative: got "drop"; accepted: "keep", "zero", "flag"');
  });

  it("5. unknown unit", () => {
    const m = errorOf(`name: t\n${BASIC_SOURCES.replace("unit: t\n    columns:\n      region", "unit: tonnes\n    columns:\n      region")}${STEP}`);
    expect(m).toMatch(/p\.yaml:6:11: sources\.production\.unit: unknown unit; accepted: g, kg, t, kt, Mt/);
    expect(m).toContain('(got "tonnes")');
  });

  it("6. unknown column type", () => {
    const m = errorOf(`name: t\n${BASIC_SOURCES.replace("quantity: quantity\n  trade", "quantity: float\n  trade")}${STEP}`);
    expect(m).toContain("p.yaml:11:17: sources.production.columns.quantity");
  });

  it("7. wrong type: a list where a mapping is expected", () => {
    const m = errorOf(`name: t\nsources: [a, b]\nsteps: []\n`);
    expect(m).toContain("p.yaml:2:10: sources: expected record");
  });

  it("8. missing required key", () => {
    const m = errorOf(`name: t\n${BASIC_SOURCES}\nsteps:\n  - id: c\n    kind: apparent-consumption\n    production: production\n`);
    expect(m).toContain("p.yaml:24:5: steps[0].trade: missing (expected string)");
  });

  it("9. a step reading a table that does not exist suggests the close name", async () => {
    const m = await planErrorOf(`name: t\n${BASIC_SOURCES}\nsteps:\n  - id: c\n    kind: apparent-consumption\n    production: prodution\n    trade: trade\n`);
    expect(m).toContain('p.yaml:26:17: steps[0].production: no table "prodution" among the sources and the tables of earlier steps; did you mean "production"?');
  });

  it("10. unknown variable", () => {
    const m = errorOf(`name: t\nvariables: { release: "2024" }\n${BASIC_SOURCES.replace("path: production.csv", "path: prod_\${relase}.csv")}${STEP}`);
    expect(m).toContain("p.yaml:6:11: sources.production.path: unknown variable ${relase}");
    expect(m).toContain("did you mean ${release}?");
  });

  it("11. a variable without default and not given", () => {
    const m = errorOf(`name: t\nvariables: { release: null }\n${BASIC_SOURCES.replace("path: production.csv", "path: prod_\${release}.csv")}${STEP}`);
    expect(m).toContain("p.yaml:2:23: variables.release: has no default and was not given; pass --set release=value");
  });

  it("12. --set of an undeclared variable", () => {
    const m = errorOf(`name: t\nvariables: { release: "1" }\n${BASIC_SOURCES}${STEP}`, { releese: "2" });
    expect(m).toContain("--set releese: no such variable");
    expect(m).toContain("did you mean release?");
  });

  it("13. YAML syntax error with position", () => {
    const m = errorOf(`name: t\nsources:\n  a: [1, 2\nsteps: []\n`);
    expect(m).toMatch(/^p\.yaml:\d+:\d+: YAML syntax error/);
  });

  it("14. duplicate keys are refused", () => {
    const m = errorOf(`name: t\nname: u\nsources: {}\nsteps: []\n`);
    expect(m).toMatch(/p\.yaml:2:1: YAML syntax error: Map keys must be unique/);
  });

  it("15. an alias bomb is refused", () => {
    const bomb = ["a: &a [x, x, x, x, x, x, x, x, x]"];
    for (let i = 0; i < 8; i++) bomb.push(`${String.fromCharCode(98 + i)}: &${String.fromCharCode(98 + i)} [${Array(9).fill("*" + String.fromCharCode(97 + i)).join(", ")}]`);
    const m = errorOf(`name: t\n${bomb.join("\n")}\nsources: {}\nsteps: []\n`);
    expect(m).toMatch(/refused: .*alias/i);
  });

  it("16. an oversized file is refused", () => {
    const m = errorOf(`name: t\n# ${"x".repeat(1024 * 1024 + 10)}\nsources: {}\nsteps: []\n`);
    expect(m).toContain("at most 1048576 are accepted");
  });

  it("17. duplicate step ids", () => {
    const m = errorOf(`name: t\n${BASIC_SOURCES}${STEP}${STEP.replace("steps:\n", "")}`);
    expect(m).toContain('steps[1].id: duplicate step id "consumption"');
  });

  it("18. a step reading a table produced only later says so", async () => {
    const m = await planErrorOf(`name: t\n${BASIC_SOURCES}\nsteps:\n  - id: w\n    kind: aggregate\n    input: consumption\n    groups: production\n${STEP.replace("steps:\n", "")}`);
    expect(m).toContain('steps[0].input: no table "consumption" yet: it is produced by a later step');
  });

  it("a valid file loads, with defaults applied and variables substituted", () => {
    const dir = tmp();
    write(dir, { "p.yaml": `name: t\nvariables: { rel: "2024" }\n${BASIC_SOURCES.replace("path: production.csv", "path: p_\${rel}.csv")}${STEP}` });
    const lp = loadPipeline(path.join(dir, "p.yaml"), { rel: "2025" });
    expect(lp.pipeline.sources.production!.path).toBe("p_2025.csv");
    expect(lp.pipeline.base_unit).toBe("t");
    expect(lp.pipeline.audit.balance_rtol).toBe(1e-9);
    expect((lp.pipeline.steps[0] as { negative: string }).negative).toBe("keep");
  });
});
