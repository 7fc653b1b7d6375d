/**
 * Turns an accumulator's raw sums into the per-variable, per-layer and network statistics of a
 * window record. The formulas live in src/analysis; this file only pools and names.
 */
import { addGrams, batchSnrDb, noiseFromGram } from '../analysis/fixed-weight-noise.js';
import { gradientStats, poolMoments, type GradientMoments } from '../analysis/gradient-stats.js';
import type { LayerStats, VariableStats } from '../protocol/records.js';
import type { RawVariableWindow } from './accumulator.js';
import type { NoiseGrams } from './noise-meter.js';

export interface WindowContext {
  batchSize: number | null;
  batchesPerEpoch: number | null;
  passBatches: readonly number[];
  /** The noise measurement at the window's end, or null: then noise_scale is null. */
  noise: NoiseGrams | null;
  /** Its accepted relative standard error of |G|². */
  maxError: number;
}

interface Pooled {
  moments: GradientMoments;
  diffTrace: number;
  weightSq: number;
  travelSq: number;
  updateSq: number | null;
  updateWeightSq: number | null;
  nonfinite: number;
  params: number;
}

function pool(parts: { raw: RawVariableWindow; params: number }[]): Pooled {
  const moments = poolMoments(
    parts.map(({ raw }) => ({ batches: raw.count, meanSquaredNorm: raw.meanSquaredNorm, varianceTrace: raw.varianceTrace })),
  );
  let weightSq = 0;
  let travelSq = 0;
  let updateSq: number | null = 0;
  let updateWeightSq: number | null = 0;
  let nonfinite = 0;
  let params = 0;
  let diffTrace = 0;
  for (const { raw, params: p } of parts) {
    diffTrace += raw.diffTrace;
    weightSq += raw.weightSq;
    travelSq += raw.travelSq;
    nonfinite += raw.nonfinite;
    params += p;
    if (raw.updateSq === null || raw.updateWeightSq === null || updateSq === null || updateWeightSq === null) {
      updateSq = null;
      updateWeightSq = null;
    } else {
      updateSq += raw.updateSq;
      updateWeightSq += raw.updateWeightSq;
    }
  }
  return { moments, diffTrace, weightSq, travelSq, updateSq, updateWeightSq, nonfinite, params };
}

/** The fixed-weight noise values of the variables at these indices, pooled (their Grams add). */
function noiseOf(
  indices: readonly number[],
  ctx: WindowContext,
): Pick<VariableStats, 'noise_scale' | 'noise_scale_rse' | 'batch_snr_db' | 'grad_noise_norm'> {
  const n = ctx.noise;
  if (n === null) return { noise_scale: null };
  const k = n.design.groups;
  const est = noiseFromGram(addGrams(indices.map((i) => n.grams[i]!), k), n.design, ctx.maxError);
  const b = ctx.batchSize;
  const snr = b === null ? null : batchSnrDb(b, est.noise_scale);
  // tr Σ is well estimated even where |G|² is not resolved: the phase detector's noise yardstick.
  const noiseNorm = b !== null && b > 0 && est.trace > 0 ? Math.sqrt(est.trace / b) : null;
  return {
    noise_scale: est.noise_scale,
    noise_scale_rse: est.noise_scale_rse,
    ...(snr === null ? {} : { batch_snr_db: snr }),
    ...(noiseNorm === null ? {} : { grad_noise_norm: noiseNorm }),
  };
}

function toStats(p: Pooled, ctx: WindowContext, indices: readonly number[]): VariableStats {
  // The window's own statistics, at moving weights: mean and spread of its minibatch gradients.
  const g = gradientStats(p.moments, ctx);
  return {
    grad_mean_norm: g.grad_mean_norm,
    grad_std_norm: g.grad_std_norm,
    grad_snr: g.grad_snr,
    grad_snr_db: g.grad_snr_db,
    grad_diff_norm: Math.sqrt(p.diffTrace),
    ...noiseOf(indices, ctx),
    weight_norm: Math.sqrt(p.weightSq),
    weight_travel: Math.sqrt(p.travelSq),
    update_ratio:
      p.updateSq === null || p.updateWeightSq === null ? Number.NaN : Math.sqrt(p.updateSq) / Math.sqrt(p.updateWeightSq),
    nonfinite: p.nonfinite,
    batches: p.moments.batches,
    params: p.params,
  };
}

export function variableStats(raw: RawVariableWindow, params: number, index: number, ctx: WindowContext): VariableStats {
  return toStats(pool([{ raw, params }]), ctx, [index]);
}

/** Pools variables (a layer) or layers' variables (the network): norms add in squares. */
export function pooledStats(parts: { raw: RawVariableWindow; params: number; index: number }[], ctx: WindowContext): VariableStats {
  return toStats(pool(parts), ctx, parts.map((p) => p.index));
}

export type { LayerStats };
