import { describe, expect, it } from "vitest";
import path from "node:path";
import { ROOT, cli, tmp, write } from "./helpers.js";

describe("command line", () => {
  it("--help lists the commands and exit codes", () => {
    const r = cli(["--help"]);
    expect(r.code).toBe(0);
    for (const c of ["run", "check", "schema"]) expect(r.stdout).toContain(c);
    expect(r.stdout).toContain("Exit codes: 0 success, 1 internal error, 2 invalid pipeline file");
    const rr = cli(["run", "--help"]);
    for (const o of ["--out", "--replace", "--set", "--quiet", "--json", "--memory-limit", "--threads"]) expect(rr.stdout).toContain(o);
  });

  it("schema prints a JSON Schema generated from the validation schemas, covering every step kind", () => {
    const r = cli(["schema"]);
    expect(r.code).toBe(0);
    const js = JSON.parse(r.stdout);
    expect(js.$schema).toMatch(/json-schema/);
    const text = JSON.stringify(js);
    for (const k of ["apparent-consumption", "concordance", "aggregate", "sql", "cohort-model", "mirror_fill", "negative_inflow"]) expect(text).toContain(k);
    expect(js.required).toEqual(expect.arrayContaining(["name", "sources", "steps"]));
  });

  it("check validates the demo without running it", () => {
    const r = cli(["check", path.join(ROOT, "pipelines", "demo.yaml")]);
    expect(r.code, r.stderr).toBe(0);
    expect(r.stdout).toContain("valid;");
    expect(r.stdout).toContain("source production: 1 file(s), columns region, commodity, year, quantity");
  });

  it("check reports a missing column without running (exit 3) and an invalid file (exit 2)", () => {
    const dir = tmp();
    write(dir, {
      "p.yaml": "name: t\nsources:\n  a:\n    path: a.csv\n    columns: { x: text, y: number }\nsteps: []\n",
      "a.csv": "x,z\n1,2\n",
      "bad.yaml": "name: t\nsources: {}\nstep: []\n",
    });
    const r = cli(["check", path.join(dir, "p.yaml")]);
    expect(r.code).toBe(3);
    expect(r.stderr).toContain("declared column(s) y not found; the file has: x, z");
    const b = cli(["check", path.join(dir, "bad.yaml"), "--json"]);
    expect(b.code).toBe(2);
    expect(JSON.parse(b.stdout).error).toContain('unknown key "step"; did you mean "steps"?');
  });

  it("--set points the pipeline at other files", () => {
    const r = cli(["check", path.join(ROOT, "pipelines", "demo.yaml"), "--set", "data=/nonexistent"]);
    expect(r.code).toBe(3);
    expect(r.stderr).toContain("/nonexistent/production.csv");
  });

  it("an unknown command or option is a usage error (exit 2)", () => {
    expect(cli(["frobnicate"]).code).toBe(2);
    expect(cli(["run", "x.yaml", "--nope"]).code).toBe(2);
  });
});
