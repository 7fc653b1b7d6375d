/**
 * Memory shared by a set of ShiftedMoments and a WebAssembly SIMD kernel that runs their block fold
 * (ShiftedMoments.pushBlock for blocks of four) with f64x2 lanes and no bounds checks, for every vector
 * in one call. The vectors to fold must already sit in the kernel's memory, so an arena hands out every
 * buffer at once, in a memory sized for them from the start. The vectors lie end to end, each padded
 * with zeros to a multiple of four coordinates: four float32 block regions, the float64 reference and
 * sums, the kernel's segment table and its per-vector results. Padding coordinates stay zero and add
 * nothing. Without WebAssembly SIMD (an old runtime) `SimdFold.create` returns null and the JavaScript
 * loop runs.
 */
import { SIMD_FOLD_BASE64 } from './simd-fold-bytes.js';

interface FoldExports {
  fold4(a: number, b: number, c: number, e: number, ref: number, s1: number, ends: number, count: number, out: number, sign: number): void;
}

type Four = readonly [Float32Array, Float32Array, Float32Array, Float32Array];

/** Storage of one vector's statistics and its four block slots, all views of the kernel's memory. */
export interface FoldSlots {
  readonly slots: Four;
  readonly ref: Float64Array;
  readonly s1: Float64Array;
}

const PAGE = 65_536;

let compiled: WebAssembly.Module | null | undefined;

function kernelModule(): WebAssembly.Module | null {
  if (compiled !== undefined) return compiled;
  compiled = null;
  try {
    const bytes = Uint8Array.from(atob(SIMD_FOLD_BASE64), (ch) => ch.charCodeAt(0));
    if (typeof WebAssembly === 'object' && WebAssembly.validate(bytes)) compiled = new WebAssembly.Module(bytes);
  } catch {
    compiled = null;
  }
  return compiled;
}

/** Four float32 coordinates are 16 bytes, the width of a SIMD load: every vector starts aligned. */
const pad4 = (n: number): number => Math.ceil(n / 4) * 4;

export class SimdFold {
  private readonly kernel: FoldExports;
  private readonly buffer: ArrayBuffer;
  readonly vectors: readonly FoldSlots[];
  /** The kernel's arguments for every vector at once, sign left out. */
  private readonly all: readonly [number, number, number, number, number, number, number, number, number];
  /** Segment ends of every vector, then one spare entry for a single vector's fold. */
  private readonly ends: Int32Array;
  /** Per vector Σ (v_k − ref)² and Σ (v_{k+1} − v_k)², then a spare pair for a single vector's fold. */
  private readonly out: Float64Array;

  private constructor(module: WebAssembly.Module, sizes: readonly number[]) {
    const padded = sizes.map(pad4);
    const total = padded.reduce((a, b) => a + b, 0);
    const count = sizes.length;
    const bytes = 4 * (4 * total) + 2 * (8 * total) + 4 * pad4(count + 1) + 8 * (2 * count + 2);
    const pages = Math.max(1, Math.ceil(bytes / PAGE));
    const memory = new WebAssembly.Memory({ initial: pages, maximum: pages });
    this.kernel = new WebAssembly.Instance(module, { env: { memory } }).exports as unknown as FoldExports;
    const buffer = memory.buffer;
    this.buffer = buffer;
    let at = 0;
    const region = <T>(make: (offset: number) => T, byteLength: number): T => {
      const view = make(at);
      at += byteLength;
      return view;
    };
    const slotRegions = [0, 1, 2, 3].map(() => region((o) => new Float32Array(buffer, o, total), 4 * total)) as unknown as Four;
    const ref = region((o) => new Float64Array(buffer, o, total), 8 * total);
    const s1 = region((o) => new Float64Array(buffer, o, total), 8 * total);
    this.ends = region((o) => new Int32Array(buffer, o, count + 1), 4 * pad4(count + 1));
    this.out = region((o) => new Float64Array(buffer, o, 2 * count + 2), 8 * (2 * count + 2));
    const [a, b, c, e] = slotRegions;
    this.all = [a.byteOffset, b.byteOffset, c.byteOffset, e.byteOffset, ref.byteOffset, s1.byteOffset, this.ends.byteOffset, count, this.out.byteOffset];
    let start = 0;
    this.vectors = sizes.map((n, i) => {
      const at0 = start;
      start += padded[i]!;
      this.ends[i] = start;
      const slots = slotRegions.map((r) => r.subarray(at0, at0 + n)) as unknown as Four;
      return { slots, ref: ref.subarray(at0, at0 + n), s1: s1.subarray(at0, at0 + n) };
    });
  }

  /** An arena for vectors of these sizes, or null where WebAssembly SIMD is not available. */
  static create(sizes: readonly number[]): SimdFold | null {
    for (const n of sizes) if (!Number.isInteger(n) || n < 0) throw new RangeError(`sizes must be non-negative integers, got ${n}`);
    const mod = kernelModule();
    if (mod === null) return null;
    try {
      return new SimdFold(mod, sizes);
    } catch (e) {
      // Over 4 GiB, or no memory to be had: the JavaScript loop folds in ordinary arrays.
      if (e instanceof RangeError) return null;
      throw e;
    }
  }

  /** True when every view lies in this arena's memory (so the kernel can address it). */
  holds(...views: readonly ArrayLike<number>[]): boolean {
    for (const v of views) if (!ArrayBuffer.isView(v) || v.buffer !== this.buffer) return false;
    return true;
  }

  /** True for a float32 vector in this arena's memory: one the kernel can fold. No allocation (per block). */
  owns(v: ArrayLike<number>): v is Float32Array {
    return v instanceof Float32Array && v.buffer === this.buffer;
  }

  /**
   * The kernel's fold of one vector: `block` its four slots, `ref` and `s1` its storage (all views this
   * arena handed out for the same vector). Returns the two sums of squares; either is NaN or infinite
   * when a value was, and then the finite coordinates were added and the others not (fold again with
   * the opposite sign to take them back).
   */
  fold4(block: Four, ref: Float64Array, s1: Float64Array, sign: 1 | -1): { y: number; q: number } {
    const [a, b, c, e] = block;
    const spare = this.ends.length - 1;
    // The vector's padding coordinates (zeros) follow it in the arena; folding them adds nothing.
    this.ends[spare] = pad4(ref.length);
    const out = this.out;
    this.kernel.fold4(a.byteOffset, b.byteOffset, c.byteOffset, e.byteOffset, ref.byteOffset, s1.byteOffset, this.ends.byteOffset + 4 * spare, 1, out.byteOffset + 8 * (out.length - 2), sign);
    return { y: out[out.length - 2]!, q: out[out.length - 1]! };
  }

  /**
   * The kernel's fold of every vector's four slots at once. Returns its results, valid until the next
   * fold: for vector i, Σ (v_k − ref)² at 2i and Σ (v_{k+1} − v_k)² at 2i + 1, as in {@link fold4}.
   */
  foldAll(sign: 1 | -1): Float64Array {
    const c = this.all;
    this.kernel.fold4(c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7], c[8], sign);
    return this.out;
  }
}
