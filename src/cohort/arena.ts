/**
 * The cohort arena: one shared WebAssembly memory in which the worker threads compute in place.
 * Inputs are copied in once (or allocated here by the caller), results are views of it, and
 * nothing is copied between threads. Only the main thread allocates. Freed blocks are kept for
 * reuse (touching fresh memory costs a page fault per 4 KiB, which costs about as much as the
 * kernel itself): best fit among free blocks, split to size, merged with free neighbours, and
 * the top of the arena lowered when its last block is freed, so requests of changing sizes do
 * not make it grow without end.
 */
import { MAX_PAGES, arenaView, attachArena, inArena, newKernelMemory, packPanels, panelLength, registerPanels } from "./wasm/index.js";

const ALIGN = 64;

export interface GroupMatrices {
  S: Float64Array;
  P: Float64Array;
  /** P in panels of 4 years (see packPanels). */
  panels: Float64Array;
  St: Float64Array | null;
}

export class KernelArena {
  private static instance: KernelArena | null = null;
  readonly memory: WebAssembly.Memory;
  /** Next free byte; the first 64 bytes stay unused, so that offset 0 means "none" to the kernels. */
  private top = ALIGN;
  private readonly live = new Map<number, number>(); // offset → bytes of a block in use
  private free: { off: number; bytes: number }[] = []; // free blocks below top, by offset
  private readonly groups = new Map<Float64Array, { m: GroupMatrices; pins: number; bytes: number; call: number }>();
  private cachedBytes = 0;
  /** Number of the current pool call (beginCall); the groups it used are kept until the next. */
  private call = 0;
  private readonly cacheBudget = Number(process.env.CAIRN_ARENA_CACHE_MB ?? 256) * 2 ** 20;

  /** The process-wide arena, attached to this thread's kernels. */
  static shared(): KernelArena {
    if (!KernelArena.instance) KernelArena.instance = new KernelArena();
    return KernelArena.instance;
  }

  /** The arena if this process made one (without making it). */
  static existing(): KernelArena | null {
    return KernelArena.instance;
  }

  private constructor() {
    this.memory = newKernelMemory();
    attachArena(this.memory);
  }

  /** Bytes from the start to the top of the arena (in use or free below the top). */
  get reservedBytes(): number {
    return this.top;
  }

  /** Bytes in blocks in use. */
  get liveBytes(): number {
    let n = 0;
    for (const b of this.live.values()) n += b;
    return n;
  }

  /** A Float64Array of `len` doubles in the arena (contents undefined). */
  alloc(len: number): Float64Array {
    const bytes = Math.max(ALIGN, Math.ceil((len * 8) / ALIGN) * ALIGN);
    let best = -1;
    for (let i = 0; i < this.free.length; i++) {
      const f = this.free[i]!;
      if (f.bytes >= bytes && (best < 0 || f.bytes < this.free[best]!.bytes)) best = i;
    }
    let off: number;
    if (best >= 0) {
      const f = this.free[best]!;
      off = f.off;
      if (f.bytes === bytes) this.free.splice(best, 1);
      else {
        f.off += bytes;
        f.bytes -= bytes;
      }
    } else {
      off = this.top;
      const end = off + bytes;
      if (end > MAX_PAGES * 65536) {
        throw new Error(`cohort arena: ${(end / 2 ** 30).toFixed(2)} GiB needed, more than the 4 GiB a WebAssembly memory can hold; run fewer series at a time`);
      }
      const have = this.memory.buffer.byteLength;
      if (end > have) this.memory.grow(Math.ceil((end - have) / 65536));
      this.top = end;
    }
    this.live.set(off, bytes);
    return arenaView(off, len);
  }

  /** A copy of `a` in the arena (or `a` itself when it lives there). */
  copyIn(a: Float64Array): Float64Array {
    if (inArena(a)) return a;
    const b = this.alloc(a.length);
    b.set(a);
    return b;
  }

  /**
   * A lifetime group's matrices in the arena: survival S, leaving P with its panel layout for
   * the product kernel, and (stock-driven) the transposed survival St. Made once per group and
   * kept: those of the latest pool call all (they were all in the arena during it anyway, and
   * a repeated call over more groups than the budget would otherwise remake every one of them:
   * least-recently-used eviction misses every time on a cycle), older ones while they fit the
   * cache budget (256 MiB by default, CAIRN_ARENA_CACHE_MB). Pinned until `unpin` so that no
   * running task loses them. Keyed by the P array itself: a group's matrices are taken as
   * fixed once made (CohortGroup never changes them).
   */
  groupMatrices(T: number, S: Float64Array, P: Float64Array, St: Float64Array | null): GroupMatrices {
    let e = this.groups.get(P);
    if (!e) {
      const m: GroupMatrices = { S: this.copyIn(S), P: this.copyIn(P), panels: this.alloc(panelLength(T)), St: null };
      packPanels(m.panels, P, T);
      e = { m, pins: 0, bytes: (2 * T * T + panelLength(T)) * 8, call: this.call };
      this.groups.set(P, e);
      this.cachedBytes += e.bytes;
    }
    if (St && !e.m.St) {
      e.m.St = this.copyIn(St);
      e.bytes += T * T * 8;
      this.cachedBytes += T * T * 8;
    }
    registerPanels(e.m.P, e.m.panels);
    e.pins++;
    e.call = this.call;
    return e.m;
  }

  /** Starts a pool call: groups used before it may now be freed beyond the cache budget. */
  beginCall(): void {
    this.call++;
  }

  /** Ends a use of groupMatrices(P); groups of earlier calls beyond the cache budget are freed, oldest first. */
  unpin(P: Float64Array): void {
    const e = this.groups.get(P);
    if (e) e.pins = Math.max(0, e.pins - 1);
    for (const [key, g] of this.groups) {
      if (this.cachedBytes <= this.cacheBudget) break;
      if (g.pins > 0 || g.call === this.call) continue;
      for (const a of [g.m.S, g.m.P, g.m.panels, g.m.St]) if (a) this.release(a);
      this.groups.delete(key);
      this.cachedBytes -= g.bytes;
    }
  }

  /** True for a whole block of this arena in use (an array from alloc, not a part of one). */
  owns(a: Float64Array): boolean {
    return inArena(a) && this.live.get(a.byteOffset) === Math.max(ALIGN, Math.ceil((a.length * 8) / ALIGN) * ALIGN);
  }

  /** Hands a block back for reuse (anything else is ignored). */
  release(a: Float64Array): void {
    if (!this.owns(a)) return;
    const off = a.byteOffset;
    const bytes = this.live.get(off)!;
    this.live.delete(off);
    // Insert by offset, then merge with the free neighbours.
    let i = 0;
    while (i < this.free.length && this.free[i]!.off < off) i++;
    this.free.splice(i, 0, { off, bytes });
    if (i + 1 < this.free.length && off + bytes === this.free[i + 1]!.off) {
      this.free[i]!.bytes += this.free[i + 1]!.bytes;
      this.free.splice(i + 1, 1);
    }
    if (i > 0 && this.free[i - 1]!.off + this.free[i - 1]!.bytes === off) {
      this.free[i - 1]!.bytes += this.free[i]!.bytes;
      this.free.splice(i, 1);
      i--;
    }
    // A free block that ends at the top lowers the top (the memory stays, for the next blocks).
    const last = this.free[this.free.length - 1];
    if (last && last.off + last.bytes === this.top) {
      this.top = last.off;
      this.free.pop();
    }
  }
}
