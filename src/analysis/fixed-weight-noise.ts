/**
 * The simple gradient noise scale B_simple = tr(Σ)/|G|² of McCandlish et al. (2018, "An Empirical Model
 * of Large-Batch Training", §2) at fixed weights, from K gradients of disjoint groups of b rows taken at
 * the same weights, with a jackknife standard error.
 *
 * Everything is computed from the groups' Gram matrix A_ij = g_i·g_j, which layers pool by addition (a
 * network's Gram is the sum of its layers'), so one set of gradients gives every layer and the network.
 *
 * Sampling: the K·b rows are drawn without replacement from a population of N rows (the training set),
 * or from a sample whose population is unknown (N = null: draws treated as independent). Then, with
 * s² = Σ_k‖g_k − m‖²/(K − 1) and m the mean of the groups (methods.md §10.1, derived for this module):
 *   E[b·s²] = tr Σ · N/(N − 1)            (Σ the per-row covariance with divisor N)
 *   E‖m‖²  = |G|² + (s²/K)·(1 − n/N)      (n = K·b; the finite-population correction, Cochran,
 *                                          Sampling Techniques, from memory)
 * so tr Σ and |G|² have unbiased estimates; with n = N the second is exactly the full-data gradient.
 */
import { powerDb } from './decibel.js';

/** One measurement's layout: K groups of `groupRows` rows out of `population` (null: unknown, large). */
export interface NoiseDesign {
  groups: number;
  groupRows: number;
  population: number | null;
}

export interface FixedWeightNoise {
  /** Unbiased estimate of |G|², the squared norm of the full gradient at these weights. */
  grad_sq: number;
  /** Unbiased estimate of tr Σ, the per-row gradient covariance trace at these weights. */
  trace: number;
  /** tr Σ / |G|², examples; null when |G|² is not resolved (see `resolved`). */
  noise_scale: number | null;
  /** Jackknife standard error of |G|², relative to the estimate; Infinity when |G|² ≤ 0. */
  grad_sq_rse: number;
  /**
   * A lower bound on the noise scale, tr Σ / (max(|G|², 0) + 2·SE(|G|²)): what can be said when |G|² is not
   * resolved (the mean gradient is lost in the noise, as near a minimum of the training loss).
   */
  noise_scale_low: number;
  /** Jackknife standard error of ln(noise scale) (≈ its relative error); Infinity when a leave-one-out |G|² ≤ 0. */
  noise_scale_rse: number;
  /** True when |G|² > 0 and its relative standard error is at most the accepted one. */
  resolved: boolean;
}

function fpcFactor(rows: number, population: number | null): number {
  return population === null ? 1 : Math.max(0, 1 - rows / population);
}

/** |G|² and tr Σ from the Gram's total T = Σ_ij A_ij and diagonal sum D over k groups. */
function fromSums(total: number, diag: number, k: number, b: number, population: number | null): { gradSq: number; trace: number } {
  const meanSq = total / (k * k);
  const s2 = (diag - total / k) / (k - 1);
  const trace = population === null ? b * s2 : (b * s2 * (population - 1)) / population;
  const gradSq = meanSq - (fpcFactor(k * b, population) * s2) / k;
  return { gradSq, trace };
}

/**
 * Estimates from a K×K Gram matrix (row-major, symmetric) of group gradients. `maxError` is the
 * relative standard error of |G|² above which the noise scale is reported missing (default 0.3).
 */
export function noiseFromGram(gram: ArrayLike<number>, design: NoiseDesign, maxError = 0.3): FixedWeightNoise {
  const k = design.groups;
  const b = design.groupRows;
  if (!(k >= 3) || gram.length < k * k) throw new RangeError(`noiseFromGram needs at least 3 groups and a ${k}×${k} Gram; got ${k} groups, ${gram.length} entries`);
  if (!(b >= 1)) throw new RangeError(`groupRows must be ≥ 1; got ${b}`);
  let total = 0;
  let diag = 0;
  const rowSums = new Float64Array(k);
  for (let i = 0; i < k; i++) {
    let r = 0;
    for (let j = 0; j < k; j++) r += gram[i * k + j]!;
    rowSums[i] = r;
    total += r;
    diag += gram[i * k + i]!;
  }
  const { gradSq, trace } = fromSums(total, diag, k, b, design.population);
  // Leave one group out: its row and column leave the total, its entry leaves the diagonal.
  const looG = new Float64Array(k);
  const looB = new Float64Array(k);
  let logsOk = true;
  for (let i = 0; i < k; i++) {
    const aii = gram[i * k + i]!;
    const t = total - 2 * rowSums[i]! + aii;
    const est = fromSums(t, diag - aii, k - 1, b, design.population);
    looG[i] = est.gradSq;
    if (est.gradSq > 0 && est.trace > 0) looB[i] = Math.log(est.trace / est.gradSq);
    else logsOk = false;
  }
  const gradSe = jackknifeSe(looG);
  const gradRse = gradSq > 0 ? gradSe / gradSq : Number.POSITIVE_INFINITY;
  const noiseRse = logsOk ? jackknifeSe(looB) : Number.POSITIVE_INFINITY;
  const low = trace > 0 && Number.isFinite(gradSe) ? trace / (Math.max(gradSq, 0) + 2 * gradSe) : Number.NaN;
  const resolved = gradSq > 0 && trace > 0 && Number.isFinite(gradSq) && Number.isFinite(trace) && gradRse <= maxError;
  return {
    grad_sq: gradSq,
    trace,
    noise_scale: resolved ? trace / gradSq : null,
    grad_sq_rse: gradRse,
    noise_scale_low: low,
    noise_scale_rse: noiseRse,
    resolved,
  };
}

/** Tukey's jackknife standard error from leave-one-out values: sqrt((K−1)/K · Σ(θ_i − θ̄)²). */
export function jackknifeSe(leaveOneOut: ArrayLike<number>): number {
  const k = leaveOneOut.length;
  if (k < 2) return Number.NaN;
  let mean = 0;
  for (let i = 0; i < k; i++) mean += leaveOneOut[i]!;
  mean /= k;
  let ss = 0;
  for (let i = 0; i < k; i++) ss += (leaveOneOut[i]! - mean) ** 2;
  return Math.sqrt(((k - 1) / k) * ss);
}

/** Adds Gram matrices (layers into a network); all must be K×K. */
export function addGrams(grams: readonly ArrayLike<number>[], k: number): Float64Array {
  const out = new Float64Array(k * k);
  for (const g of grams) for (let i = 0; i < k * k; i++) out[i]! += g[i]!;
  return out;
}

/**
 * The SNR of one training minibatch of B rows at fixed weights, |G| / sqrt(tr Σ / B) = sqrt(B / B_simple),
 * in dB (a power ratio B/B_simple, so 10·log10; methods.md §2). It crosses 0 dB where B = B_simple.
 */
export function batchSnrDb(batchSize: number, noiseScale: number | null): number | null {
  if (noiseScale === null || !(noiseScale > 0) || !(batchSize > 0)) return null;
  return powerDb(batchSize / noiseScale);
}
