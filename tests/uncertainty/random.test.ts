/**
 * The seeded generator against published reference outputs, its jump against a matrix power of
 * its own transition (over GF(2)), reproducibility, and the jstat bridge.
 */
import { describe, expect, it } from "vitest";
import pkg from "jstat";
import { Rng, splitMix64, withRandom } from "../../src/uncertainty/random.js";

const { jStat } = pkg;

const rotl = (x: number, k: number) => ((x << k) | (x >>> (32 - k))) >>> 0;

describe("SplitMix64", () => {
  it("matches the reference outputs for seed 1234567", () => {
    // Source: reference splitmix64.c (Vigna), first outputs for seed 1234567 as listed by
    // Rosetta Code, "Pseudo-random numbers/Splitmix64".
    const next = splitMix64(1234567n);
    expect([next(), next(), next(), next(), next()]).toEqual([
      6457827717110365317n,
      3203168211198807973n,
      9817491932198370423n,
      4593380528125082431n,
      16408922859458223821n,
    ]);
  });

  it("fills the xoshiro state from two outputs, low 32 bits first", () => {
    const next = splitMix64(1234567n);
    const a = next();
    const b = next();
    const words = [a & 0xffffffffn, a >> 32n, b & 0xffffffffn, b >> 32n].map(Number);
    expect(new Rng(1234567).state()).toEqual(words);
  });
});

describe("xoshiro128**", () => {
  it("has the reference state transition (version 1.0 outputs, scrambler on s[0])", () => {
    // Source: outputs of the reference xoshiro128starstar.c (2018, version 1.0, result =
    // rotl(s[0]·5, 7)·9) for the state {1, 2, 3, 4}, as listed in the tests of the Rust crate
    // rand_xoshiro. Version 1.1 changed only the scrambled word (s[1]), not the transition, so
    // scrambling s[0] of our state before each step must reproduce them.
    const expected = [5760, 40320, 70819200, 3297914139, 2480851620, 1792823698, 4118739149, 1251203317, 1581886583, 1721184582];
    const r = Rng.fromState([1, 2, 3, 4]);
    const got: number[] = [];
    for (let i = 0; i < expected.length; i++) {
      const s0 = r.state()[0];
      got.push(Math.imul(rotl(Math.imul(s0, 5) >>> 0, 7), 9) >>> 0);
      r.nextUint32();
    }
    expect(got).toEqual(expected);
  });

  it("scrambles s[1] (version 1.1): first outputs from {1, 2, 3, 4} computed by hand", () => {
    // result = rotl(s1·5, 7)·9, then t = s1 << 9; s2 ^= s0; s3 ^= s1; s1 ^= s2; s0 ^= s3; s2 ^= t; s3 = rotl(s3, 11).
    // Step 1: s1 = 2 → rotl(10, 7)·9 = 1280·9 = 11520; new state s0 = 7, s1 = 0, s2 = 1026, s3 = 12288.
    // Step 2: s1 = 0 → 0; new state s0 = 12295, s1 = 1029, s2 = 1029, s3 = 12288 << 11.
    // Step 3: s1 = 1029 → rotl(5145, 7)·9 = 5145·128·9 = 5927040.
    const r = Rng.fromState([1, 2, 3, 4]);
    expect([r.nextUint32(), r.nextUint32(), r.nextUint32()]).toEqual([11520, 0, 5927040]);
  });

  it("jump() equals 2^64 steps: the transition matrix over GF(2) raised to 2^64", () => {
    // The state update is linear over GF(2). Column j of T is the successor of basis state e_j;
    // squaring T 64 times gives T^(2^64). Jump constants: reference xoshiro128starstar.c.
    const toBig = (w: number[]) => w.reduce((acc, x, i) => acc | (BigInt(x >>> 0) << BigInt(32 * i)), 0n);
    const fromBig = (v: bigint) => [0, 1, 2, 3].map((i) => Number((v >> BigInt(32 * i)) & 0xffffffffn));
    const step = (v: bigint) => {
      const r = Rng.fromState(fromBig(v) as [number, number, number, number]);
      r.nextUint32();
      return toBig(r.state());
    };
    let cols: bigint[] = [];
    for (let j = 0; j < 128; j++) cols.push(step(1n << BigInt(j)));
    const apply = (m: bigint[], v: bigint) => {
      let out = 0n;
      for (let j = 0; j < 128; j++) if ((v >> BigInt(j)) & 1n) out ^= m[j]!;
      return out;
    };
    for (let s = 0; s < 64; s++) cols = cols.map((c) => apply(cols, c));
    const r = new Rng(99);
    const before = toBig(r.state());
    r.jump();
    expect(toBig(r.state())).toBe(apply(cols, before));
  });
});

describe("Rng", () => {
  it("gives byte-identical draws for the same seed and different ones for another seed", () => {
    const draw = (seed: number) => {
      const r = new Rng(seed);
      return Float64Array.from({ length: 1000 }, () => r.uniform());
    };
    const a = draw(7);
    expect(Buffer.from(draw(7).buffer).equals(Buffer.from(a.buffer))).toBe(true);
    expect(Buffer.from(draw(8).buffer).equals(Buffer.from(a.buffer))).toBe(false);
  });

  it("keeps uniforms strictly inside (0, 1) with mean 1/2 and variance 1/12", () => {
    const r = new Rng(1);
    const n = 200_000;
    let s = 0;
    let s2 = 0;
    let lo = 1;
    let hi = 0;
    for (let i = 0; i < n; i++) {
      const u = r.uniform();
      s += u;
      s2 += u * u;
      lo = Math.min(lo, u);
      hi = Math.max(hi, u);
    }
    expect(lo).toBeGreaterThan(0);
    expect(hi).toBeLessThan(1);
    // U(0, 1): mean 1/2, sd √(1/12) (NIST/SEMATECH e-Handbook §1.3.6.6.2); tolerance 4 standard errors.
    expect(Math.abs(s / n - 0.5)).toBeLessThan(4 * Math.sqrt(1 / 12 / n));
    const v = s2 / n - (s / n) ** 2;
    // var of U² terms: E[U⁴] − E[U²]² = 1/5 − 1/9; standard error of the variance ≈ √((μ4 − σ⁴)/n), μ4 = 1/80.
    expect(Math.abs(v - 1 / 12)).toBeLessThan(4 * Math.sqrt((1 / 80 - 1 / 144) / n));
  });

  it("rejects a seed that is not a safe whole number", () => {
    expect(() => new Rng(1.5)).toThrow(/whole number.*got 1\.5/);
    expect(() => Rng.stream(1, -1)).toThrow(/stream number.*got -1/);
  });

  it("streams differ from each other and from the seed's own generator", () => {
    const a = new Rng(3).state();
    const b = Rng.stream(3, 1).state();
    const c = Rng.stream(3, 2).state();
    expect(b).not.toEqual(a);
    expect(c).not.toEqual(b);
    expect(Rng.stream(3, 0).state()).toEqual(a);
  });
});

describe("withRandom", () => {
  it("drives jstat's samplers with the generator and restores the previous source", () => {
    const before = jStat._random_fn;
    const a = withRandom(new Rng(5), () => [jStat.normal.sample(0, 1), jStat.uniform.sample(0, 1)]);
    const b = withRandom(new Rng(5), () => [jStat.normal.sample(0, 1), jStat.uniform.sample(0, 1)]);
    expect(a).toEqual(b);
    expect(jStat._random_fn).toBe(before);
  });

  it("restores the previous source when the callback throws, and nests", () => {
    const before = jStat._random_fn;
    const outer = new Rng(1);
    expect(() =>
      withRandom(outer, () => {
        withRandom(new Rng(2), () => undefined);
        expect(jStat._random_fn).toBe(outer.uniform);
        throw new Error("boom");
      }),
    ).toThrow("boom");
    expect(jStat._random_fn).toBe(before);
  });
});
