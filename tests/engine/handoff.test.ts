import { describe, expect, it } from "vitest";
import { existsSync } from "node:fs";
import path from "node:path";
import { Session } from "../../src/engine/session.js";
import { nativeReader, ReadBuffers, readColumns, sortedKeyCounts, useNativeReader, writeColumns } from "../../src/engine/handoff.js";
import { ROOT } from "../helpers.js";

const N = 5000; // more than two DuckDB chunks (2048 rows each)

async function reference(s: Session, sql: string): Promise<unknown[][]> {
  // node-api's own row reader: an independent path from the chunk copies under test
  return (await s.conn.runAndReadAll(sql)).getRows();
}

describe("hand-off between DuckDB and typed arrays", () => {
  for (const native of [true, false]) {
    it(`reads DOUBLE and INTEGER columns, in order, ${native ? "with the native reader" : "through the bindings"}`, async () => {
      if (native && !nativeReader()) return; // not built on this machine: the other case covers the path used
      useNativeReader(native);
      const s = await Session.open();
      try {
        const sql = `SELECT CAST(i AS DOUBLE) / 7 AS v, CAST(i * 3 - 100 AS INTEGER) AS k FROM range(${N}) t(i) ORDER BY i`;
        const r = await readColumns(s, sql, ["f64", "i32"]);
        const ref = await reference(s, sql);
        expect(r.rows).toBe(N);
        for (let i = 0; i < N; i++) {
          expect(r.columns[0]![i]).toBe(ref[i]![0]);
          expect(r.columns[1]![i]).toBe(ref[i]![1]);
        }
        await expect(readColumns(s, `SELECT CASE WHEN i = 4321 THEN NULL ELSE 1.5 END::DOUBLE FROM range(${N}) t(i)`, ["f64"]))
          .rejects.toThrow("hand-off: column 0 holds NULLs");
        await expect(readColumns(s, "SELECT 1::BIGINT", ["i32"])).rejects.toThrow("not INTEGER");
      } finally {
        s.close();
        useNativeReader(true);
      }
    });
  }

  it("reads into kept buffers: the second read reuses the first read's memory and gives the new rows", async () => {
    const s = await Session.open();
    try {
      const b = new ReadBuffers();
      const sql = (n: number, f: number) => `SELECT CAST(i AS DOUBLE) * ${f} AS v, CAST(i AS INTEGER) AS k FROM range(${n}) t(i) ORDER BY i`;
      const first = await readColumns(s, sql(N, 0.5), ["f64", "i32"], b);
      const second = await readColumns(s, sql(N - 100, 0.25), ["f64", "i32"], b);
      expect(second.columns[0]!.buffer).toBe(first.columns[0]!.buffer); // the same memory, no new array
      expect(second.columns[0]!.length).toBe(N - 100);
      const ref = await reference(s, sql(N - 100, 0.25)); // node-api's own row reader
      for (let i = 0; i < N - 100; i += 37) {
        expect(second.columns[0]![i]).toBe(ref[i]![0]);
        expect(second.columns[1]![i]).toBe(ref[i]![1]);
      }
      const larger = await readColumns(s, sql(N + 10, 1), ["f64", "i32"], b);
      expect(larger.columns[0]!.buffer).not.toBe(first.columns[0]!.buffer); // too small: a new array
      expect(larger.columns[0]![N + 9]).toBe(N + 9);
    } finally {
      s.close();
    }
  });

  it.runIf(existsSync(path.join(ROOT, "build", "cairn_handoff.node")))("the native reader, built at install, loads", () => {
    expect(nativeReader()).not.toBeNull();
  });

  it("writes many typed-array rows in batches that DuckDB reads at once (the same rows)", async () => {
    const s = await Session.open();
    try {
      const M = 200_000; // more than one batch of the in-place scan
      const a = Int32Array.from({ length: M }, (_, i) => i);
      const v = Float64Array.from({ length: M }, (_, i) => i / 3);
      await writeColumns(s, "u", [{ name: "a", kind: "i32", data: a }, { name: "v", kind: "f64", data: v }], M);
      const rows = await reference(s, "SELECT a, v FROM u ORDER BY a");
      expect(rows.length).toBe(M);
      expect(rows.every((r, i) => r[0] === i && r[1] === v[i])).toBe(true);
    } finally {
      s.close();
    }
  });

  it("writes typed arrays back as a table", async () => {
    const s = await Session.open();
    try {
      const a = Int32Array.from({ length: N }, (_, i) => i % 97);
      const v = Float64Array.from({ length: N }, (_, i) => i * 0.25);
      await writeColumns(s, "t", [{ name: "a", kind: "i32", data: a }, { name: "v", kind: "f64", data: v }], N);
      const rows = await reference(s, "SELECT a, v FROM t");
      expect(rows.length).toBe(N);
      expect(rows.every((r, i) => r[0] === a[i] && r[1] === v[i])).toBe(true);
    } finally {
      s.close();
    }
  });
});

describe("sorted keys outside DuckDB (native/keysort.c)", () => {
  it("counts rows, NULL keys and repeated keys as SQL's sort does", async () => {
    const s = await Session.open();
    try {
      // 1,000,000 keys: i % 300,007 repeats, every 97th NULL. Reference: DuckDB's own counts.
      const sql = "SELECT CASE WHEN i % 97 = 0 THEN NULL ELSE hash(i % 300007) END FROM range(1000000) t(i)";
      const r = await sortedKeyCounts(s, sql);
      expect(r).not.toBeNull();
      const ref = await s.one(`SELECT count(*) AS rows, count(*) - count(h) AS nulls, count(h) - count(DISTINCT h) AS equal FROM (${sql}) q(h)`);
      expect(r).toEqual({ rows: Number(ref.rows), nulls: Number(ref.nulls), outOfRange: 0, equal: Number(ref.equal), pairs: 0, overBudget: 0 });
      // beyond the memory budget: no answer (the caller sorts in SQL)
      process.env.CAIRN_SINK_MAX_BYTES = "1000000";
      try {
        expect(await sortedKeyCounts(s, sql)).toBeNull();
      } finally {
        delete process.env.CAIRN_SINK_MAX_BYTES;
      }
    } finally {
      s.close();
    }
  });
});
