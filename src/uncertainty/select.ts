/**
 * Selection of order statistics in place, without a full sort.
 *
 * `selectRank` is Floyd & Rivest's SELECT (Communications of the ACM 18(3), 1975, 173–176,
 * Algorithm 489): on ranges longer than 600 it first recurses on a small sample around the
 * expected position of rank k, so the partition that follows brackets k closely; expected
 * comparisons n + min(k, n − k) + o(n). After `selectRank(a, k, lo, hi)`, a[k] holds the value
 * of rank k within a[lo..hi], everything in a[lo..k) is ≤ a[k] and everything in (k..hi] ≥ a[k].
 *
 * `selectRanks` places several ranks (sorted, distinct) by recursion: select the middle one, then
 * the lower ranks in the left part and the higher in the right part, so each partition reuses
 * the previous ones. A rank at the edge of its part is found by a linear min or max scan (the
 * usual case for the second order statistic of a type-7 quantile, next to the first).
 * Input must hold no NaN (callers check).
 */

function swap(a: Float64Array, i: number, j: number): void {
  const t = a[i]!;
  a[i] = a[j]!;
  a[j] = t;
}

export function selectRank(a: Float64Array, k: number, lo: number, hi: number): void {
  let left = lo;
  let right = hi;
  while (right > left) {
    if (right - left > 600) {
      const n = right - left + 1;
      const i = k - left + 1;
      const z = Math.log(n);
      const s = 0.5 * Math.exp((2 * z) / 3);
      const sd = 0.5 * Math.sqrt((z * s * (n - s)) / n) * Math.sign(i - n / 2);
      const newLeft = Math.max(left, Math.floor(k - (i * s) / n + sd));
      const newRight = Math.min(right, Math.floor(k + ((n - i) * s) / n + sd));
      selectRank(a, k, newLeft, newRight);
    }
    const t = a[k]!;
    let i = left;
    let j = right;
    swap(a, left, k);
    if (a[right]! > t) swap(a, left, right);
    while (i < j) {
      swap(a, i, j);
      i++;
      j--;
      while (a[i]! < t) i++;
      while (a[j]! > t) j--;
    }
    if (a[left] === t) swap(a, left, j);
    else {
      j++;
      swap(a, j, right);
    }
    if (j <= k) left = j + 1;
    if (k <= j) right = j - 1;
  }
}

function placeMin(a: Float64Array, lo: number, hi: number): void {
  let m = lo;
  let v = a[lo]!;
  for (let i = lo + 1; i <= hi; i++) {
    const x = a[i]!;
    if (x < v) {
      v = x;
      m = i;
    }
  }
  swap(a, lo, m);
}

function placeMax(a: Float64Array, lo: number, hi: number): void {
  let m = hi;
  let v = a[hi]!;
  for (let i = lo; i < hi; i++) {
    const x = a[i]!;
    if (x > v) {
      v = x;
      m = i;
    }
  }
  swap(a, hi, m);
}

/**
 * Places every rank in ranks[rFrom..rTo) (sorted ascending, distinct, all within [lo, hi]) at its
 * position of a[lo..hi].
 */
export function selectRanks(a: Float64Array, ranks: Int32Array, rFrom: number, rTo: number, lo: number, hi: number): void {
  while (rFrom < rTo) {
    if (ranks[rFrom] === lo) {
      placeMin(a, lo, hi);
      rFrom++;
      lo++;
      continue;
    }
    if (ranks[rTo - 1] === hi) {
      placeMax(a, lo, hi);
      rTo--;
      hi--;
      continue;
    }
    const mid = (rFrom + rTo) >> 1;
    const k = ranks[mid]!;
    selectRank(a, k, lo, hi);
    selectRanks(a, ranks, rFrom, mid, lo, k - 1);
    rFrom = mid + 1;
    lo = k + 1;
  }
}
