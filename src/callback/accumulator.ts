/**
 * What an accumulator gives back when a window closes: per tracked variable, the sufficient
 * statistics of its minibatch gradients and the weight norms, as plain numbers.
 */
import type { GradientPair } from './optimizer-tap.js';

export interface RawVariableWindow {
  /** Minibatch gradients accumulated (K for this variable). */
  count: number;
  meanSquaredNorm: number;
  varianceTrace: number;
  /** Half the mean squared difference of consecutive minibatch gradients (summed over coordinates); NaN without pairs. */
  diffTrace: number;
  nonfinite: number;
  /** ||w||² at the window's end. */
  weightSq: number;
  /** ||w − w₀||² at the window's end. */
  travelSq: number;
  /** ||Δw||² and ||w||² after one sampled step, or null when no step was sampled. */
  updateSq: number | null;
  updateWeightSq: number | null;
}

/**
 * Minibatches folded into the sums in one pass (ShiftedMoments.pushBlock), counted from a window's first step.
 * The consecutive-difference pairs of `diffTrace` are taken within these blocks by every accumulator, so
 * the js and tensor paths give the same numbers.
 */
export const BLOCK = 4;

export interface Accumulator {
  readonly kind: 'js' | 'tensor';
  /** Inside the tap, before the update. `sample` asks for the update size of this step. */
  before(grads: readonly GradientPair[], sample: boolean): void;
  /** Inside the tap, after the update. */
  after(sample: boolean): void;
  /** Minibatches accumulated since the last close. */
  readonly pending: number;
  /**
   * Ends the window: takes the statistics now (synchronously, so the next step starts clean) and
   * resolves with the numbers (the tensor path reads them back once, asynchronously).
   */
  close(): Promise<RawVariableWindow[]>;
  dispose(): void;
}
