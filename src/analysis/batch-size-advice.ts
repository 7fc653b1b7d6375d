/**
 * What the recent fixed-weight noise scale says about the batch size, in one sentence. B_simple estimates
 * the batch size beyond which larger batches give diminishing returns (McCandlish et al. 2018, "An
 * Empirical Model of Large-Batch Training": steps fall as 1 + B_noise/B, examples grow as 1 + B/B_noise).
 * The thresholds (×2, ×½) are a rule of thumb (common practice, no source).
 */

/** How many of the latest measured values the sentence takes the median of. */
export const BATCH_ADVICE_RECENT = 5;

function median(values: readonly number[]): number {
  const sorted = [...values].sort((a, b) => a - b);
  const mid = sorted.length >> 1;
  return sorted.length % 2 === 1 ? sorted[mid]! : (sorted[mid - 1]! + sorted[mid]!) / 2;
}

function formatCount(x: number): string {
  if (x >= 100) return Math.round(x).toLocaleString('en-US');
  return x.toPrecision(3).replace(/\.?0+$/, '');
}

/**
 * `noiseScales`: the network's noise_scale of each window in step order (null where none was measured or
 * resolved); `batchSize`: the run's latest batch size, or null when unknown.
 */
export function batchSizeAdvice(noiseScales: readonly (number | null)[], batchSize: number | null): string {
  const recent = noiseScales.filter((v): v is number => v !== null && Number.isFinite(v) && v > 0).slice(-BATCH_ADVICE_RECENT);
  const lead =
    'The gradient noise scale estimates the batch size beyond which larger batches give diminishing returns (McCandlish et al. 2018); ' +
    'tidemark measures it at fixed weights, from gradients of disjoint groups of training rows.';
  if (recent.length === 0) return `${lead} No estimate yet: no noise measurement has resolved the mean gradient from the noise.`;
  const m = median(recent);
  const est = `Median of the last ${recent.length} measurement${recent.length === 1 ? '' : 's'}: about ${formatCount(m)} examples`;
  if (batchSize === null || !(batchSize > 0)) return `${lead} ${est}; the run's batch size is unknown, so there is nothing to compare it with.`;
  const ratio = m / batchSize;
  const verdict =
    ratio > 2
      ? `above the batch size of ${formatCount(batchSize)}, so larger batches would likely still pay off`
      : ratio < 0.5
        ? `below the batch size of ${formatCount(batchSize)}, so the batch is likely already past the point of full returns`
        : `close to the batch size of ${formatCount(batchSize)}`;
  return `${lead} ${est}, ${verdict}. It is an estimate, and it changes as training goes on; confirm any change of batch size on held-out data.`;
}
