/**
 * The package as a user gets it: `npm pack`, installed into a new project, gives a `cairn`
 * command that runs the built-in demo, and `import … from "cairn"` (ESM, with types).
 */
import { describe, expect, it } from "vitest";
import { execFileSync, spawnSync } from "node:child_process";
import { existsSync, readdirSync, readFileSync } from "node:fs";
import path from "node:path";
import { ROOT, tmp, write } from "./helpers.js";

describe("the packed package", () => {
  it("installs into a new project: a cairn command that runs the demo, and the library by import", () => {
    const dir = tmp("cairn-pack-");
    execFileSync("npm", ["pack", "--pack-destination", dir, "--silent"], { cwd: ROOT, stdio: "pipe" });
    const tgz = readdirSync(dir).find((f) => f.endsWith(".tgz"))!;
    const app = path.join(dir, "app");
    write(app, {
      "package.json": JSON.stringify({ name: "app", version: "1.0.0", type: "module", private: true }),
      "use.mjs": `import { loadPipeline, makeLifetime, curveOf } from "cairn";\nconst c = curveOf(makeLifetime({ distribution: "fixed", mean: 2 }, "x"), 4);\nconsole.log(typeof loadPipeline, Array.from(c.sigma).join(","));\n`,
    });
    execFileSync("npm", ["install", "--prefer-offline", "--no-audit", "--no-fund", "--silent", path.join(dir, tgz)], { cwd: app, stdio: "pipe" });
    // A fixed lifetime of 2 years (midpoint convention): σ(0) = σ(1) = 1, σ(2) = S(2.5) = 0 (DOMAIN.md).
    expect(execFileSync("node", ["use.mjs"], { cwd: app, encoding: "utf8" }).trim()).toBe("function 1,1,0,0");
    expect(existsSync(path.join(app, "node_modules", "cairn", "dist", "index.d.ts"))).toBe(true);
    const bin = path.join(app, "node_modules", ".bin", "cairn");
    const r = spawnSync(bin, ["demo", "--out", path.join(app, "runs", "demo"), "--quiet"], { cwd: app, encoding: "utf8" });
    expect(r.status, r.stderr).toBe(0);
    const manifest = JSON.parse(readFileSync(path.join(app, "runs", "demo", "manifest.json"), "utf8"));
    expect(manifest.status).toBe("ok");
    expect(manifest.outputs.map((o: { table: string }) => o.table)).toContain("scenario_materials");
  }, 180_000);
});
