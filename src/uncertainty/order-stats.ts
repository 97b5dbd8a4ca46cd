/**
 * Several order statistics of one sample at once, by bucketing and then selection.
 *
 * Why not plain selection: partitioning random data mispredicts about every second branch, and
 * V8 compiles the comparisons as branches; on this machine a Floyd–Rivest selection of 10 ranks
 * in 1000 values costs ~40 µs. Bucketing has no data-dependent branches in its inner loops:
 *   1. each value goes to one of NB equal-width buckets between the sample's min and max
 *      (index = ⌊(x − min)·scale⌋, counted per bucket);
 *   2. prefix sums tell which bucket holds each wanted rank, and its rank within the bucket;
 *   3. only the values of those buckets are gathered, and the wanted ranks are selected among them
 *      (select.ts), or, for a bucket still large (skewed data), the same procedure is applied to it
 *      again, up to MAX_DEPTH levels deep.
 * The results are the exact order statistics (values are moved, never computed). A range that is
 * not finite (±∞ in the sample) falls back to selection over the whole sample.
 */
import { selectRanks } from "./select.js";

const MAX_DEPTH = 3;
const SMALL = 64;

interface Level {
  counts: Int32Array;
  pos: Int32Array;
  bucket: Uint16Array;
  gather: Float64Array;
  /** Ranks handed to this level, its leaf's absolute positions, its results. */
  ranks: Int32Array;
  abs: Int32Array;
  vals: Float64Array;
  /** Per wanted rank: its bucket and that bucket's gather start. */
  rankBucket: Int32Array;
  rankStart: Int32Array;
}

/** Scratch space for samples of up to `maxN` values and up to `maxRanks` wanted ranks. */
export class OrderStats {
  private readonly levels: Level[] = [];
  readonly maxN: number;
  readonly maxRanks: number;

  constructor(maxN: number, maxRanks: number) {
    this.maxN = maxN;
    this.maxRanks = maxRanks;
    const nb = bucketsFor(maxN);
    for (let l = 0; l <= MAX_DEPTH; l++) {
      this.levels.push({
        counts: new Int32Array(nb + 1),
        pos: new Int32Array(nb),
        bucket: new Uint16Array(maxN),
        gather: new Float64Array(maxN),
        ranks: new Int32Array(maxRanks),
        abs: new Int32Array(maxRanks),
        vals: new Float64Array(maxRanks),
        rankBucket: new Int32Array(maxRanks),
        rankStart: new Int32Array(maxRanks),
      });
    }
  }

  /** Σ(x − centre) and Σ(x − centre)² of the last `select` call's sample. */
  dev = 0;
  dev2 = 0;

  /**
   * Writes the values of ranks[0..R) (0-based, sorted ascending, distinct, < n) of x[off..off+n)
   * into vals[0..R), leaving x unchanged. `min` and `max` are the sample's extremes. On the way it
   * sums the deviations from `centre` into `dev` and `dev2` (for the variance, in the same pass).
   */
  select(x: Float64Array, off: number, n: number, min: number, max: number, ranks: Int32Array, R: number, vals: Float64Array, centre: number): void {
    if (n > this.maxN || R > this.maxRanks) throw new RangeError(`order statistics: sample of ${n} with ${R} ranks exceeds the scratch size (${this.maxN}, ${this.maxRanks})`);
    const L = this.levels[0]!;
    L.ranks.set(ranks.subarray(0, R));
    const nb = bucketsFor(n);
    const scale = (nb * (1 - 2 ** -40)) / (max - min);
    if (min === max || n <= SMALL || !(scale > 0 && scale < Infinity)) {
      let d = 0;
      let d2 = 0;
      for (let i = 0; i < n; i++) {
        const e = x[off + i]! - centre;
        d += e;
        d2 += e * e;
      }
      this.dev = d;
      this.dev2 = d2;
      // Selection reorders: work on a copy.
      L.gather.set(x.subarray(off, off + n));
      this.run(L.gather, 0, n, min, max, R, 0);
    } else {
      const { counts, bucket } = L;
      counts.fill(0, 0, nb + 1);
      let d0 = 0;
      let d1 = 0;
      let q0 = 0;
      let q1 = 0;
      let i = 0;
      for (; i + 1 < n; i += 2) {
        const a = x[off + i]!;
        const b = x[off + i + 1]!;
        const ea = a - centre;
        const eb = b - centre;
        d0 += ea;
        d1 += eb;
        q0 += ea * ea;
        q1 += eb * eb;
        const ka = ((a - min) * scale) | 0;
        const kb = ((b - min) * scale) | 0;
        bucket[i] = ka;
        bucket[i + 1] = kb;
        counts[ka + 1]!++;
        counts[kb + 1]!++;
      }
      if (i < n) {
        const a = x[off + i]!;
        const ea = a - centre;
        d0 += ea;
        q0 += ea * ea;
        const ka = ((a - min) * scale) | 0;
        bucket[i] = ka;
        counts[ka + 1]!++;
      }
      this.dev = d0 + d1;
      this.dev2 = q0 + q1;
      this.fromBuckets(x, off, n, nb, R, 0);
    }
    vals.set(L.vals.subarray(0, R));
  }

  /** Order statistics of x[off..off+n) for levels[depth].ranks[0..R), into levels[depth].vals; x may be reordered. */
  private run(x: Float64Array, off: number, n: number, min: number, max: number, R: number, depth: number): void {
    const L = this.levels[depth]!;
    const { ranks, vals } = L;
    if (min === max) {
      for (let r = 0; r < R; r++) vals[r] = min;
      return;
    }
    const nb = bucketsFor(n);
    const scale = (nb * (1 - 2 ** -40)) / (max - min);
    if (n <= SMALL || depth >= MAX_DEPTH || !(scale > 0 && scale < Infinity)) {
      const abs = L.abs;
      for (let r = 0; r < R; r++) abs[r] = ranks[r]! + off;
      selectRanks(x, abs, 0, R, off, off + n - 1);
      for (let r = 0; r < R; r++) vals[r] = x[abs[r]!]!;
      return;
    }
    const { counts, bucket } = L;
    counts.fill(0, 0, nb + 1);
    for (let i = 0; i < n; i++) {
      const b = ((x[off + i]! - min) * scale) | 0;
      bucket[i] = b;
      counts[b + 1]!++;
    }
    this.fromBuckets(x, off, n, nb, R, depth);
  }

  /** Steps 2 and 3, once levels[depth].bucket and .counts (shifted by one) are filled. */
  private fromBuckets(x: Float64Array, off: number, n: number, nb: number, R: number, depth: number): void {
    const L = this.levels[depth]!;
    const { ranks, vals, counts, pos, bucket, gather, rankBucket, rankStart } = L;
    // counts[b] becomes the number of values in the buckets before b.
    for (let b = 0; b < nb; b++) counts[b + 1]! += counts[b]!;
    // The bucket of each wanted rank (the last b with counts[b] ≤ rank), and a gather region
    // for each such bucket.
    pos.fill(-1, 0, nb);
    let size = 0;
    for (let r = 0; r < R; r++) {
      const rank = ranks[r]!;
      let lo = 0;
      let hi = nb - 1;
      while (lo < hi) {
        const mid = (lo + hi + 1) >> 1;
        if (counts[mid]! <= rank) lo = mid;
        else hi = mid - 1;
      }
      rankBucket[r] = lo;
      if (pos[lo] === -1) {
        pos[lo] = size;
        size += counts[lo + 1]! - counts[lo]!;
      }
      rankStart[r] = pos[lo]!;
    }
    for (let i = 0; i < n; i++) {
      const b = bucket[i]!;
      const p = pos[b]!;
      if (p >= 0) {
        gather[p] = x[off + i]!;
        pos[b] = p + 1;
      }
    }
    // Each target bucket in turn, with its ranks shifted to the bucket.
    const sub = this.levels[depth + 1]!;
    let r = 0;
    while (r < R) {
      const b = rankBucket[r]!;
      let rEnd = r + 1;
      while (rEnd < R && rankBucket[rEnd] === b) rEnd++;
      const start = rankStart[r]!;
      const m = counts[b + 1]! - counts[b]!;
      const k = rEnd - r;
      for (let q = 0; q < k; q++) sub.ranks[q] = ranks[r + q]! - counts[b]!;
      if (m <= SMALL) {
        // Small bucket: select directly (its extremes are not needed).
        const abs = sub.abs;
        for (let q = 0; q < k; q++) abs[q] = sub.ranks[q]! + start;
        selectRanks(gather, abs, 0, k, start, start + m - 1);
        for (let q = 0; q < k; q++) vals[r + q] = gather[abs[q]!]!;
        r = rEnd;
        continue;
      }
      let bmin = Infinity;
      let bmax = -Infinity;
      for (let i = start; i < start + m; i++) {
        const v = gather[i]!;
        if (v < bmin) bmin = v;
        if (v > bmax) bmax = v;
      }
      this.run(gather, start, m, bmin, bmax, k, depth + 1);
      for (let q = 0; q < k; q++) vals[r + q] = sub.vals[q]!;
      r = rEnd;
    }
  }
}

function bucketsFor(n: number): number {
  return Math.max(16, Math.min(4096, Math.ceil(n / 2)));
}
