/**
 * The cohort arena: one shared WebAssembly memory in which the worker threads compute in place.
 * Inputs are copied in once (or allocated here by the caller), results are views of it, and
 * nothing is copied between threads. Only the main thread allocates; freed blocks are kept
 * for reuse by later requests of the same size (touching fresh memory costs a page fault per
 * 4 KiB, which costs about as much as the kernel itself).
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
  private readonly sizes = new Map<number, number>(); // offset → bytes of a live or free block
  private readonly free = new Map<number, number[]>(); // bytes → free offsets
  private readonly groups = new Map<Float64Array, { m: GroupMatrices; pins: number; bytes: number }>();
  private cachedBytes = 0;
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

  /** Bytes in use or kept for reuse. */
  get reservedBytes(): number {
    return this.top;
  }

  /** A Float64Array of `len` doubles in the arena (contents undefined). */
  alloc(len: number): Float64Array {
    const bytes = Math.max(ALIGN, Math.ceil((len * 8) / ALIGN) * ALIGN);
    const reuse = this.free.get(bytes);
    let off = reuse?.pop();
    if (off === undefined) {
      off = this.top;
      const end = off + bytes;
      if (end > MAX_PAGES * 65536) {
        throw new Error(`cohort arena: ${(end / 2 ** 30).toFixed(2)} GiB needed, more than the 4 GiB a WebAssembly memory can hold; run fewer series at a time`);
      }
      const have = this.memory.buffer.byteLength;
      if (end > have) this.memory.grow(Math.ceil((end - have) / 65536));
      this.top = end;
      this.sizes.set(off, bytes);
    }
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
   * kept while they fit the cache budget (256 MiB by default, CAIRN_ARENA_CACHE_MB); pinned
   * until `unpin` so that no running task loses them. Keyed by the P array itself: a group's
   * matrices are taken as fixed once made (CohortGroup never changes them).
   */
  groupMatrices(T: number, S: Float64Array, P: Float64Array, St: Float64Array | null): GroupMatrices {
    let e = this.groups.get(P);
    if (!e) {
      const m: GroupMatrices = { S: this.copyIn(S), P: this.copyIn(P), panels: this.alloc(panelLength(T)), St: null };
      packPanels(m.panels, P, T);
      e = { m, pins: 0, bytes: (2 * T * T + panelLength(T)) * 8 };
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
    return e.m;
  }

  /** Ends a use of groupMatrices(P); groups beyond the cache budget are freed, oldest first. */
  unpin(P: Float64Array): void {
    const e = this.groups.get(P);
    if (e) e.pins = Math.max(0, e.pins - 1);
    for (const [key, g] of this.groups) {
      if (this.cachedBytes <= this.cacheBudget) break;
      if (g.pins > 0) continue;
      for (const a of [g.m.S, g.m.P, g.m.panels, g.m.St]) if (a) this.release(a);
      this.groups.delete(key);
      this.cachedBytes -= g.bytes;
    }
  }

  /** True for a whole block of this arena (an array from alloc, not a part of one). */
  owns(a: Float64Array): boolean {
    return inArena(a) && this.sizes.get(a.byteOffset) === Math.max(ALIGN, Math.ceil((a.length * 8) / ALIGN) * ALIGN);
  }

  /** Hands a block back for reuse. */
  release(a: Float64Array): void {
    if (!this.owns(a)) return;
    const bytes = this.sizes.get(a.byteOffset)!;
    const l = this.free.get(bytes) ?? [];
    if (!l.includes(a.byteOffset)) l.push(a.byteOffset);
    this.free.set(bytes, l);
  }
}
