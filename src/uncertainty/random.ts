/**
 * Seeded random numbers for Monte Carlo runs, and the bridge that lets jstat's samplers use them.
 *
 * Generator: xoshiro128** (Blackman & Vigna, "Scrambled linear pseudorandom number generators",
 * ACM TOMS 47(4), 2021; reference code xoshiro128starstar.c): 128 bits of state, period 2^128 − 1,
 * 32-bit outputs. Its state is filled from an integer seed by SplitMix64 (Steele, Lea & Flood,
 * "Fast splittable pseudorandom number generators", OOPSLA 2014), as the xoshiro authors advise:
 * two SplitMix64 outputs give the four 32-bit words (low word first), so no seed gives the
 * all-zero state. `jump()` advances by 2^64 steps (the reference code's JUMP polynomial), for
 * non-overlapping streams: `Rng.stream(seed, k)` is the seed's generator jumped k times.
 *
 * Uniforms: `uniform()` takes 26 high bits of each of two outputs, k ∈ [0, 2^52), and returns
 * (k + 0.5)·2^−52: strictly inside (0, 1) (from 2^−53 to 1 − 2^−53), so log(u) and quantile(u) are
 * always finite.
 *
 * jstat: its samplers call `jStat._random_fn` (set by `jStat.setRandom`). `withRandom(rng, f)`
 * installs `rng.uniform` for the duration of `f` and restores the previous source afterwards, even
 * if `f` throws. Only samplers that draw through `_random_fn` are used in this folder (normal,
 * lognormal, uniform, triangular); jstat's large-λ Poisson sampler calls Math.random directly and
 * must not be used.
 */
import pkg from "jstat";

const { jStat } = pkg;

const MASK64 = (1n << 64n) - 1n;

/** SplitMix64 as a sequence of 64-bit outputs (BigInt; used only for seeding). */
export function splitMix64(seed: bigint): () => bigint {
  let state = BigInt.asUintN(64, seed);
  return () => {
    state = (state + 0x9e3779b97f4a7c15n) & MASK64;
    let z = state;
    z = ((z ^ (z >> 30n)) * 0xbf58476d1ce4e5b9n) & MASK64;
    z = ((z ^ (z >> 27n)) * 0x94d049bb133111ebn) & MASK64;
    return z ^ (z >> 31n);
  };
}

const JUMP = [0x8764000b, 0xf542d2d3, 0x6fa035c3, 0x77f2db5b];

export class Rng {
  private s0: number;
  private s1: number;
  private s2: number;
  private s3: number;

  /** A generator for an integer seed (any safe integer, negative ones included). */
  constructor(seed: number) {
    if (!Number.isSafeInteger(seed)) {
      throw new RangeError(`random seed must be a whole number between ${Number.MIN_SAFE_INTEGER} and ${Number.MAX_SAFE_INTEGER} (got ${seed})`);
    }
    const next = splitMix64(BigInt(seed));
    const a = next();
    const b = next();
    this.s0 = Number(a & 0xffffffffn) | 0;
    this.s1 = Number(a >> 32n) | 0;
    this.s2 = Number(b & 0xffffffffn) | 0;
    this.s3 = Number(b >> 32n) | 0;
  }

  /** Generator `k` of a family of non-overlapping streams for one seed (k ≥ 0 jumps of 2^64). */
  static stream(seed: number, k: number): Rng {
    if (!Number.isInteger(k) || k < 0) throw new RangeError(`stream number must be a whole number ≥ 0 (got ${k})`);
    const r = new Rng(seed);
    for (let i = 0; i < k; i++) r.jump();
    return r;
  }

  /** A generator whose state is set directly (four 32-bit words; not all zero). For reference tests. */
  static fromState(words: readonly [number, number, number, number]): Rng {
    if (words.every((w) => (w | 0) === 0)) throw new RangeError("xoshiro128** state must not be all zero");
    const r = new Rng(0);
    r.s0 = words[0] | 0;
    r.s1 = words[1] | 0;
    r.s2 = words[2] | 0;
    r.s3 = words[3] | 0;
    return r;
  }

  /** Next 32-bit output as an unsigned integer. */
  nextUint32(): number {
    const s1 = this.s1;
    const m = Math.imul(s1, 5);
    const result = Math.imul((m << 7) | (m >>> 25), 9) >>> 0;
    const t = s1 << 9;
    this.s2 ^= this.s0;
    this.s3 ^= s1;
    this.s1 = s1 ^ this.s2;
    this.s0 ^= this.s3;
    this.s2 ^= t;
    this.s3 = (this.s3 << 11) | (this.s3 >>> 21);
    return result;
  }

  /** A uniform number strictly inside (0, 1), 52 random bits. Bound: safe to pass as a callback. */
  readonly uniform = (): number => {
    const hi = this.nextUint32() >>> 6;
    const lo = this.nextUint32() >>> 6;
    return (hi * 67108864 + lo + 0.5) * 2.220446049250313e-16;
  };

  /** A whole number in [0, n) for 1 ≤ n ≤ 2^32, by floor(n·u) (bias below n·2^−52). */
  below(n: number): number {
    return Math.floor(this.uniform() * n);
  }

  /** Advances the state by 2^64 outputs (reference code's jump()). */
  jump(): void {
    let t0 = 0;
    let t1 = 0;
    let t2 = 0;
    let t3 = 0;
    for (const word of JUMP) {
      for (let b = 0; b < 32; b++) {
        if ((word >>> b) & 1) {
          t0 ^= this.s0;
          t1 ^= this.s1;
          t2 ^= this.s2;
          t3 ^= this.s3;
        }
        this.nextUint32();
      }
    }
    this.s0 = t0;
    this.s1 = t1;
    this.s2 = t2;
    this.s3 = t3;
  }

  /** The four state words (unsigned), e.g. to check a jump. */
  state(): [number, number, number, number] {
    return [this.s0 >>> 0, this.s1 >>> 0, this.s2 >>> 0, this.s3 >>> 0];
  }
}

/**
 * Runs `f` with jstat's samplers drawing from `rng`, then restores jstat's previous source.
 * Calls nest: an inner call restores the outer generator.
 */
export function withRandom<T>(rng: Rng, f: () => T): T {
  const previous = jStat._random_fn;
  jStat.setRandom(rng.uniform);
  try {
    return f();
  } finally {
    jStat.setRandom(previous);
  }
}
