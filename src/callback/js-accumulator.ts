/**
 * Float64 accumulators on the host, for backends whose tensors live in memory JavaScript can read
 * cheaply (cpu, wasm, tensorflow): each gradient is read once and folded into a shifted sum and sum of
 * squares per coordinate (methods.md §4), by blocks of four minibatches: on cpu and wasm in a
 * WebAssembly SIMD kernel (the gradients copied into its memory), elsewhere in JavaScript.
 */
import { countNonFinite, ShiftedMoments } from '../analysis/moments.js';
import { SimdFold } from '../analysis/simd-fold.js';
import { BLOCK, type Accumulator, type RawVariableWindow } from './accumulator.js';
import type { ModelView } from './model-layers.js';
import { benefitsFromBuffers, foldsInKernel, readValues, wasmHeap } from './host-read.js';
import type { GradientPair } from './optimizer-tap.js';

type Values = ArrayLike<number>;

/**
 * ‖a − b‖² and ‖a‖² in one pass: the update ratio's two sums on a window's first step, travel and weight norm
 * at its close. Two partial sums each break the add-latency chain of one running sum (a third faster).
 */
function diffAndSumSq(a: Values, b: Values, out: Float64Array): void {
  let d2 = 0;
  let s2 = 0;
  let d2b = 0;
  let s2b = 0;
  const n = a.length;
  const even = n - (n % 2);
  for (let k = 0; k < even; k += 2) {
    const x = a[k]!;
    const y = a[k + 1]!;
    const d = x - b[k]!;
    const e = y - b[k + 1]!;
    d2 += d * d;
    s2 += x * x;
    d2b += e * e;
    s2b += y * y;
  }
  if (even < n) {
    const x = a[even]!;
    const d = x - b[even]!;
    d2 += d * d;
    s2 += x * x;
  }
  out[0] = d2 + d2b;
  out[1] = s2 + s2b;
}

export interface JsAccumulatorOptions {
  /** Fold blocks with the WebAssembly SIMD kernel on the backends where it pays (default true; false: the JavaScript loop). */
  kernel?: boolean;
}

type Steps = (Values | null)[][];

export class JsAccumulator implements Accumulator {
  readonly kind = 'js' as const;
  /** 'simd' where blocks are folded by the WebAssembly kernel in its own memory (cpu and wasm backends), else 'js'. */
  readonly folding: 'simd' | 'js';
  private readonly view: ModelView;
  private readonly moments: ShiftedMoments[];
  private readonly initial: Float32Array[];
  private readonly nonfinite: Float64Array;
  /** The kernel's arena, where blocks are folded in one call for every variable, or null. */
  private readonly simd: SimdFold | null;
  /** Gradients read but not yet folded in: the first `queued` entries, one per step, indexed by variable. */
  private readonly block: Steps;
  private queued = 0;
  /** The variable of each position in the last step's gradient list: the list comes in the same order every step. */
  private readonly positions: { name: string; index: number }[] = [];
  private readonly beforeWeights: (Values | null)[];
  /** Per block slot and variable, reusable copies of gradients (the kernel's slots, or plain arrays on wasm), or null. */
  private readonly buffers: (Float32Array[] | null)[];
  /** Reusable copies of the weights before and after a sampled step, and at a window's end (wasm). */
  private readonly weightBuffers: { before: Float32Array[]; after: Float32Array[] } | null;
  /** Reads go straight to the wasm heap (the wasm backend). */
  private readonly wasmReads: boolean;
  private updateSq: Float64Array;
  private updateWeightSq: Float64Array;
  /** Scratch for diffAndSumSq's two sums. */
  private readonly pair: Float64Array;
  private sampled = false;
  private steps = 0;

  constructor(view: ModelView, options: JsAccumulatorOptions = {}) {
    this.view = view;
    const n = view.variables.length;
    const useBuffers = benefitsFromBuffers();
    this.wasmReads = useBuffers;
    // Copy gradients into the SIMD kernel's memory and fold them there: on wasm they are copied anyway, on
    // cpu the copy costs less than the JavaScript fold saves.
    const useKernel = options.kernel !== false && foldsInKernel() && BLOCK === 4;
    const fold = useKernel ? SimdFold.create(view.variables.map((v) => v.size)) : null;
    this.folding = fold === null ? 'js' : 'simd';
    this.simd = fold;
    this.block = Array.from({ length: BLOCK }, () => new Array<Values | null>(n).fill(null));
    this.moments = view.variables.map((v, i) =>
      fold === null ? new ShiftedMoments(v.size) : new ShiftedMoments(v.size, { ...fold.vectors[i]!, fold }),
    );
    // Copies: the backend may hand out its live buffer, which the optimizer replaces each step.
    this.initial = view.variables.map((v) => Float32Array.from(v.variable.dataSync() as Float32Array));
    this.nonfinite = new Float64Array(n);
    this.beforeWeights = new Array<Values | null>(n).fill(null);
    this.buffers = Array.from({ length: BLOCK }, (_, k) =>
      fold !== null ? fold.vectors.map((f) => f.slots[k]!) : useBuffers ? view.variables.map((v) => new Float32Array(v.size)) : null,
    );
    this.weightBuffers = useBuffers
      ? { before: view.variables.map((v) => new Float32Array(v.size)), after: view.variables.map((v) => new Float32Array(v.size)) }
      : null;
    this.updateSq = new Float64Array(n);
    this.updateWeightSq = new Float64Array(n);
    this.pair = new Float64Array(2);
  }

  get pending(): number {
    return this.steps;
  }

  before(grads: readonly GradientPair[], sample: boolean): void {
    // Values are copied into the kernel's slots; without them, holding dataSync's arrays until the block is
    // folded is safe: tensors never change, and cpu hands out its (never reused) buffer, the others a copy.
    const step = this.block[this.queued]!;
    step.fill(null);
    const slot = this.buffers[this.queued] ?? null;
    const wasm = this.wasmReads ? wasmHeap() : null;
    for (let p = 0; p < grads.length; p++) {
      const [name, tensor] = grads[p]!;
      if (tensor === null) continue;
      const index = this.indexOf(p, name);
      if (index >= 0) step[index] = readValues(tensor, slot?.[index] ?? null, wasm);
    }
    this.queued++;
    this.steps++;
    if (this.queued >= BLOCK) this.fold();
    if (sample) {
      for (const v of this.view.variables) {
        this.beforeWeights[v.index] = readValues(v.variable, this.weightBuffers?.before[v.index] ?? null, wasm);
      }
    }
  }

  /** The tracked variable at position `p` of the gradient list, or −1; a map lookup only when the list changed. */
  private indexOf(p: number, name: string): number {
    const known = this.positions[p];
    if (known !== undefined && known.name === name) return known.index;
    const index = this.view.byName.get(name)?.index ?? -1;
    this.positions[p] = { name, index };
    return index;
  }

  /** Folds the pending steps into the sums. A layer's variables enter together or not at all. */
  private fold(): void {
    const count = this.queued;
    if (count === 0) return;
    this.queued = 0;
    const steps = this.block.slice(0, count);
    const fold = this.simd;
    if (count === BLOCK && fold !== null && this.inSlots()) {
      for (let i = 0; i < fold.vectors.length; i++) this.moments[i]!.adoptReference(fold.vectors[i]!.slots[0]);
      this.record(fold, fold.foldAll(1), steps);
      return;
    }
    for (const layer of this.view.layers) {
      const blocks = layer.variables.map((v) => {
        const b: Values[] = [];
        for (const st of steps) {
          const data = st[v.index];
          if (data != null) b.push(data);
        }
        return b;
      });
      let ok = 0;
      while (ok < blocks.length && this.moments[layer.variables[ok]!.index]!.pushBlock(blocks[ok]!)) ok++;
      if (ok === blocks.length) continue;
      // Something was NaN or infinite: take the block back and go step by step.
      for (let i = 0; i < ok; i++) this.moments[layer.variables[i]!.index]!.unpushBlock(blocks[i]!);
      this.foldStepByStep(layer, steps);
    }
  }

  /** True when every variable of the block's every step was copied into its kernel slot. */
  private inSlots(): boolean {
    for (let k = 0; k < BLOCK; k++) {
      const step = this.block[k]!;
      const slot = this.buffers[k]!;
      for (let i = 0; i < step.length; i++) if (step[i] !== slot[i]) return false;
    }
    return true;
  }

  /**
   * Counts a block the kernel folded for every variable (`out`: its sums of squares, two per variable); a
   * layer with a value that is not finite is taken back and goes step by step.
   */
  private record(fold: SimdFold, out: Float64Array, steps: Steps): void {
    for (const layer of this.view.layers) {
      let finite = true;
      for (const v of layer.variables) {
        if (!Number.isFinite(out[2 * v.index]!) || !Number.isFinite(out[2 * v.index + 1]!)) finite = false;
      }
      if (finite) {
        for (const v of layer.variables) this.moments[v.index]!.recordBlock(BLOCK, out[2 * v.index]!, out[2 * v.index + 1]!);
        continue;
      }
      // The kernel added the finite coordinates of this layer's variables: take exactly those back.
      for (const v of layer.variables) {
        const f = fold.vectors[v.index]!;
        fold.fold4(f.slots, f.ref, f.s1, -1);
      }
      this.foldStepByStep(layer, steps);
    }
  }

  /** A layer's steps one at a time, counting what is not finite and leaving out the steps that have any. */
  private foldStepByStep(layer: ModelView['layers'][number], steps: Steps): void {
    for (const st of steps) {
      let bad = 0;
      for (const v of layer.variables) {
        const data = st[v.index];
        const n = data == null ? 0 : countNonFinite(data);
        this.nonfinite[v.index] = this.nonfinite[v.index]! + n;
        bad += n;
      }
      if (bad > 0) continue;
      for (const v of layer.variables) {
        const data = st[v.index];
        if (data != null) this.moments[v.index]!.push(data);
      }
    }
  }

  after(sample: boolean): void {
    if (!sample) return;
    // Looked up again: the update may have grown the wasm heap since `before`.
    const wasm = this.wasmReads ? wasmHeap() : null;
    for (const v of this.view.variables) {
      const before = this.beforeWeights[v.index];
      if (before == null) continue;
      const now = readValues(v.variable, this.weightBuffers?.after[v.index] ?? null, wasm);
      diffAndSumSq(now, before, this.pair);
      this.updateSq[v.index] = this.pair[0]!;
      this.updateWeightSq[v.index] = this.pair[1]!;
      this.beforeWeights[v.index] = null;
    }
    this.sampled = true;
  }

  close(): Promise<RawVariableWindow[]> {
    this.fold();
    const wasm = this.wasmReads ? wasmHeap() : null;
    const out: RawVariableWindow[] = this.view.variables.map((v) => {
      const m = this.moments[v.index]!;
      const w = readValues(v.variable, this.weightBuffers?.after[v.index] ?? null, wasm);
      diffAndSumSq(w, this.initial[v.index]!, this.pair);
      return {
        count: m.count,
        meanSquaredNorm: m.meanSquaredNorm(),
        varianceTrace: m.varianceTrace(),
        diffTrace: m.successiveDiffTrace(),
        nonfinite: this.nonfinite[v.index]!,
        weightSq: this.pair[1]!,
        travelSq: this.pair[0]!,
        updateSq: this.sampled ? this.updateSq[v.index]! : null,
        updateWeightSq: this.sampled ? this.updateWeightSq[v.index]! : null,
      };
    });
    for (const m of this.moments) m.reset();
    this.nonfinite.fill(0);
    this.updateSq = new Float64Array(this.view.variables.length);
    this.updateWeightSq = new Float64Array(this.view.variables.length);
    this.sampled = false;
    this.steps = 0;
    return Promise.resolve(out);
  }

  dispose(): void {
    this.queued = 0;
    for (const step of this.block) step.fill(null);
    this.beforeWeights.fill(null);
  }
}
