/**
 * Window statistics of minibatch gradients: mean and spread norms, their ratio (SNR), and the
 * simple gradient noise scale of McCandlish et al. (2018), with the bias correction of the squared
 * mean norm worked out in methods.md §1.4.
 */
import { amplitudeDb } from './decibel.js';

/** Sufficient statistics of K minibatch gradients of one layer (or of the pooled network). */
export interface GradientMoments {
  /** K, the number of minibatch gradients. */
  batches: number;
  /** ||m||², the squared norm of the elementwise mean gradient. */
  meanSquaredNorm: number;
  /** Σ_j s_j², the summed unbiased elementwise variance (trace of the sample covariance). */
  varianceTrace: number;
}

export interface GradientContext {
  /** B, examples per minibatch. Without it the noise scale is unknown (null). */
  batchSize?: number | null;
  /** M, minibatches per epoch, when the window's batches come from shuffled passes over the data. */
  batchesPerEpoch?: number | null;
  /**
   * How the window's K minibatches split over the passes (epochs) it touched, e.g. [40, 8]. Each pass is
   * a draw without replacement; passes are independent. Default: all K from one pass.
   */
  passBatches?: readonly number[] | null;
}

export interface GradientStats {
  grad_mean_norm: number;
  grad_std_norm: number;
  /** Amplitude ratio ||m|| / ||s||. On pure noise it sits near {@link snrFloor}, not at 0. */
  grad_snr: number;
  /** 20·log10 of `grad_snr`. */
  grad_snr_db: number;
  /** B·Σs² / |G|²_est; null when the corrected signal is not positive or B is unknown. */
  noise_scale: number | null;
  /** Bias-corrected estimate of the squared true gradient norm, |G|²_est. */
  signal_sq: number;
}

/**
 * Finite-population factor f for the noise part of ||m||², E||m||² = |G|² + f·tr(Σ)/(B·K).
 * Minibatches drawn without replacement from an epoch of M partly cancel: a window with k_p of its K
 * minibatches in pass p has f = Σ_p k_p(1 − k_p/M) / K, which is 1 − K/M for one pass and 0 for a
 * whole epoch (Cochran, Sampling Techniques, finite population correction). Without M, f = 1.
 */
export function finitePopulationFactor(
  batches: number,
  batchesPerEpoch?: number | null,
  passBatches?: readonly number[] | null,
): number {
  if (batchesPerEpoch == null || !(batchesPerEpoch > 0) || !(batches > 0)) return 1;
  const parts = passBatches != null && passBatches.length > 0 ? passBatches : [batches];
  let acc = 0;
  for (const k of parts) acc += k * Math.max(0, 1 - k / batchesPerEpoch);
  return acc / batches;
}

/** The SNR that pure noise reads at: sqrt(f/K) (1/sqrt(K) for independent draws). */
export function snrFloor(
  batches: number,
  batchesPerEpoch?: number | null,
  passBatches?: readonly number[] | null,
): number {
  if (!(batches > 0)) return Number.NaN;
  return Math.sqrt(finitePopulationFactor(batches, batchesPerEpoch, passBatches) / batches);
}

export function gradientStats(m: GradientMoments, ctx: GradientContext = {}): GradientStats {
  const meanNorm = Math.sqrt(m.meanSquaredNorm);
  const stdNorm = Math.sqrt(m.varianceTrace);
  const snr = meanNorm / stdNorm;
  // E||m||² = |G|² + f·tr(Σ)/(B·K) and E Σs² = tr(Σ)/B, so subtracting f·Σs²/K removes the bias.
  const f = finitePopulationFactor(m.batches, ctx.batchesPerEpoch, ctx.passBatches);
  const signal = m.meanSquaredNorm - (f * m.varianceTrace) / m.batches;
  const b = ctx.batchSize;
  const noiseScale =
    b != null && b > 0 && signal > 0 && Number.isFinite(signal) && Number.isFinite(m.varianceTrace)
      ? (b * m.varianceTrace) / signal
      : null;
  return {
    grad_mean_norm: meanNorm,
    grad_std_norm: stdNorm,
    grad_snr: snr,
    grad_snr_db: amplitudeDb(snr),
    noise_scale: noiseScale,
    signal_sq: signal,
  };
}

/**
 * Pools layers into one network-level entry. Norms add in squares, so the pooled noise scale is
 * the ratio of sums Σ S_l / Σ |G|²_l, not a mean of per-layer ratios (methods.md §1.4).
 */
export function poolMoments(parts: readonly GradientMoments[]): GradientMoments {
  let meanSq = 0;
  let varTrace = 0;
  let batches = Number.POSITIVE_INFINITY;
  for (const p of parts) {
    meanSq += p.meanSquaredNorm;
    varTrace += p.varianceTrace;
    batches = Math.min(batches, p.batches);
  }
  return { batches: parts.length > 0 ? batches : 0, meanSquaredNorm: meanSq, varianceTrace: varTrace };
}

/**
 * The unbiased two-batch estimators of McCandlish et al. (2018), Appendix A.1: squared norms of
 * gradients at a small and a big batch size give |G|² and tr(Σ); their ratio is B_simple.
 */
export function twoBatchNoiseScale(
  bSmall: number,
  bBig: number,
  normSqSmall: number,
  normSqBig: number,
): { gradSq: number; trace: number; noiseScale: number } {
  if (!(bBig > bSmall && bSmall > 0)) throw new RangeError(`need 0 < bSmall < bBig, got ${bSmall}, ${bBig}`);
  const gradSq = (bBig * normSqBig - bSmall * normSqSmall) / (bBig - bSmall);
  const trace = (normSqSmall - normSqBig) / (1 / bSmall - 1 / bBig);
  return { gradSq, trace, noiseScale: trace / gradSq };
}
