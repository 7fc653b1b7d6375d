/**
 * The optimizer tap: an instance-level wrapper of `optimizer.applyGradients`, which fit,
 * fitDataset, trainOnBatch and minimize all call once per minibatch with that minibatch's
 * gradients. Listeners see the gradients before and after the update; the update itself is the
 * original call with the original arguments, so training is bit-for-bit unchanged.
 */
import type * as tf from '@tensorflow/tfjs';

export type GradientPair = readonly [name: string, tensor: tf.Tensor | null];

export interface TapListener {
  /** Before the update; gradients are valid until `after` returns. */
  before(grads: readonly GradientPair[]): void;
  /** After the update has been applied. */
  after(grads: readonly GradientPair[]): void;
  /** Anything `before` or `after` threw. May rethrow (strict mode) to fail the training step. */
  onError(error: unknown): void;
}

interface TapState {
  original: (...args: unknown[]) => unknown;
  hadOwn: boolean;
  tapped: (...args: unknown[]) => unknown;
  listeners: Set<TapListener>;
}

const TAP = Symbol.for('tidemark.optimizer-tap');

type Tappable = tf.Optimizer & { [TAP]?: TapState; applyGradients: (...args: unknown[]) => unknown };

function toPairs(arg: unknown): GradientPair[] {
  if (Array.isArray(arg)) {
    return (arg as { name: string; tensor: tf.Tensor | null }[]).map((g) => [g.name, g.tensor ?? null] as const);
  }
  if (arg !== null && typeof arg === 'object') {
    return Object.entries(arg as Record<string, tf.Tensor | null>).map(([k, t]) => [k, t ?? null] as const);
  }
  return [];
}

/** Adds `listener` to the optimizer's tap, installing the tap once. Returns the removal function. */
export function installTap(optimizer: tf.Optimizer, listener: TapListener): () => void {
  const opt = optimizer as Tappable;
  let state = opt[TAP];
  if (state === undefined) {
    const hadOwn = Object.prototype.hasOwnProperty.call(opt, 'applyGradients');
    const original = opt.applyGradients;
    const listeners = new Set<TapListener>();
    const tapped = function (this: unknown, ...args: unknown[]): unknown {
      if (listeners.size === 0) return original.apply(this, args);
      const pairs = toPairs(args[0]);
      for (const l of listeners) {
        try {
          l.before(pairs);
        } catch (error) {
          l.onError(error);
        }
      }
      const result = original.apply(this, args);
      for (const l of listeners) {
        try {
          l.after(pairs);
        } catch (error) {
          l.onError(error);
        }
      }
      return result;
    };
    state = { original, hadOwn, tapped, listeners };
    Object.defineProperty(opt, TAP, { value: state, configurable: true, enumerable: false, writable: true });
    opt.applyGradients = tapped;
  }
  state.listeners.add(listener);
  const s = state;
  return () => {
    s.listeners.delete(listener);
    if (s.listeners.size > 0) return;
    // Someone wrapped applyGradients after us: leave our (now pass-through) wrapper in their chain.
    if (opt.applyGradients !== s.tapped) return;
    if (s.hadOwn) opt.applyGradients = s.original;
    else delete (opt as Partial<Tappable>).applyGradients;
    delete opt[TAP];
  };
}

/** True while any listener is installed on this optimizer. */
export function isTapped(optimizer: tf.Optimizer): boolean {
  const s = (optimizer as Tappable)[TAP];
  return s !== undefined && s.listeners.size > 0;
}
