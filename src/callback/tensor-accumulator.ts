/**
 * Tensor-op accumulators, for backends where reading a gradient back each step would stall the
 * device pipeline (webgl, webgpu). Sums stay on the device; a window close reduces everything
 * into one small tensor and reads it back once.
 */
import * as tf from '@tensorflow/tfjs';
import { BLOCK, type Accumulator, type RawVariableWindow } from './accumulator.js';
import type { ModelView } from './model-layers.js';
import type { GradientPair } from './optimizer-tap.js';

interface Slot {
  ref: tf.Tensor | null;
  s1: tf.Tensor | null;
  s2: tf.Tensor | null;
  count: number;
  /**
   * The previous minibatch gradient (non-finite entries replaced), and Σ (g_{k+1} − g_k)² so far, elementwise:
   * summed once at the close rather than reduced to a scalar every step.
   */
  prev: tf.Tensor | null;
  diffSq: tf.Tensor | null;
  pairs: number;
  nonfinite: tf.Scalar | null;
  before: tf.Tensor | null;
  updateSq: tf.Scalar | null;
  updateWeightSq: tf.Scalar | null;
}

function replace<T extends tf.Tensor>(old: T | null, next: T): T {
  tf.keep(next);
  if (old !== null) old.dispose();
  return next;
}

export class TensorAccumulator implements Accumulator {
  readonly kind = 'tensor' as const;
  private readonly view: ModelView;
  private readonly slots: Slot[];
  private readonly initial: tf.Tensor[];
  private steps = 0;

  constructor(view: ModelView) {
    this.view = view;
    this.slots = view.variables.map(() => ({
      ref: null,
      s1: null,
      s2: null,
      count: 0,
      prev: null,
      diffSq: null,
      pairs: 0,
      nonfinite: null,
      before: null,
      updateSq: null,
      updateWeightSq: null,
    }));
    this.initial = view.variables.map((v) => tf.keep(tf.clone(v.variable)));
  }

  get pending(): number {
    return this.steps;
  }

  before(grads: readonly GradientPair[], sample: boolean): void {
    const { byName } = this.view;
    for (const [name, g] of grads) {
      if (g === null) continue;
      const v = byName.get(name);
      if (v === undefined) continue;
      const slot = this.slots[v.index]!;
      tf.tidy(() => {
        const finite = tf.isFinite(g);
        const bad = tf.sum(tf.cast(tf.logicalNot(finite), 'float32')) as tf.Scalar;
        slot.nonfinite = replace(slot.nonfinite, slot.nonfinite === null ? bad : (tf.add(slot.nonfinite, bad) as tf.Scalar));
        if (slot.ref === null) {
          // Non-finite entries are replaced by the reference, so they add no deviation.
          slot.ref = replace(null, tf.where(finite, g, tf.zerosLike(g)));
          slot.s1 = replace(null, tf.zerosLike(g));
          slot.s2 = replace(null, tf.zerosLike(g));
          slot.prev = replace(slot.prev, tf.clone(slot.ref));
        } else {
          const clean = tf.where(finite, g, slot.ref);
          const d = tf.sub(clean, slot.ref);
          slot.s1 = replace(slot.s1, tf.add(slot.s1!, d));
          slot.s2 = replace(slot.s2, tf.add(slot.s2!, tf.square(d)));
          // Pairs within blocks of BLOCK steps, as the js accumulator takes them.
          if (slot.count % BLOCK !== 0) {
            const q = tf.squaredDifference(clean, slot.prev!);
            slot.diffSq = replace(slot.diffSq, slot.diffSq === null ? q : tf.add(slot.diffSq, q));
            slot.pairs++;
          }
          slot.prev = replace(slot.prev, clean);
        }
        slot.count++;
      });
    }
    this.steps++;
    if (sample) {
      for (const v of this.view.variables) {
        const slot = this.slots[v.index]!;
        slot.before?.dispose();
        slot.before = tf.keep(tf.clone(v.variable));
      }
    }
  }

  after(sample: boolean): void {
    if (!sample) return;
    for (const v of this.view.variables) {
      const slot = this.slots[v.index]!;
      const before = slot.before;
      if (before === null) continue;
      tf.tidy(() => {
        slot.updateSq = replace(slot.updateSq, tf.sum(tf.squaredDifference(v.variable, before)) as tf.Scalar);
        slot.updateWeightSq = replace(slot.updateWeightSq, tf.sum(tf.square(v.variable)) as tf.Scalar);
      });
      before.dispose();
      slot.before = null;
    }
  }

  async close(): Promise<RawVariableWindow[]> {
    const FIELDS = 8;
    const nanScalar = (): tf.Scalar => tf.scalar(Number.NaN);
    const packed = tf.tidy(() => {
      const parts: tf.Tensor[] = [];
      for (const v of this.view.variables) {
        const s = this.slots[v.index]!;
        let meanSq: tf.Scalar = nanScalar();
        let varTrace: tf.Scalar = nanScalar();
        if (s.ref !== null && s.count > 0) {
          const n = s.count;
          const mean = tf.add(s.ref, tf.div(s.s1!, n));
          meanSq = tf.sum(tf.square(mean));
          if (n > 1) {
            const m2 = tf.relu(tf.sub(s.s2!, tf.div(tf.square(s.s1!), n)));
            varTrace = tf.div(tf.sum(m2), n - 1);
          }
        }
        parts.push(
          meanSq,
          varTrace,
          s.nonfinite ?? tf.scalar(0),
          tf.sum(tf.square(v.variable)),
          tf.sum(tf.squaredDifference(v.variable, this.initial[v.index]!)),
          s.updateSq ?? nanScalar(),
          s.updateWeightSq ?? nanScalar(),
          s.diffSq !== null && s.pairs > 0 ? tf.div(tf.sum(s.diffSq), 2 * s.pairs) : nanScalar(),
        );
      }
      return tf.stack(parts);
    });
    const counts = this.slots.map((s) => s.count);
    this.reset();
    const values = await packed.data();
    packed.dispose();
    return this.view.variables.map((v, i) => {
      const o = i * FIELDS;
      const upd = values[o + 5]!;
      return {
        count: counts[v.index]!,
        meanSquaredNorm: values[o]!,
        varianceTrace: values[o + 1]!,
        nonfinite: values[o + 2]!,
        weightSq: values[o + 3]!,
        travelSq: values[o + 4]!,
        updateSq: Number.isNaN(upd) ? null : upd,
        updateWeightSq: Number.isNaN(upd) ? null : values[o + 6]!,
        diffTrace: values[o + 7]!,
      };
    });
  }

  private reset(): void {
    for (const s of this.slots) {
      for (const key of ['ref', 's1', 's2', 'prev', 'diffSq', 'nonfinite', 'updateSq', 'updateWeightSq'] as const) {
        s[key]?.dispose();
        s[key] = null;
      }
      s.count = 0;
      s.pairs = 0;
    }
    this.steps = 0;
  }

  dispose(): void {
    this.reset();
    for (const s of this.slots) {
      s.before?.dispose();
      s.before = null;
    }
    for (const t of this.initial) t.dispose();
    this.initial.length = 0;
  }
}
