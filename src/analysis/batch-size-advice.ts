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

/** One noise measurement of the network. */
export interface NoiseReading {
  /** Step at which it was taken (the window's last step). */
  step: number;
  /** The noise scale, examples; null when the measurement did not resolve it. */
  value: number | null;
  /** When unresolved: a lower bound on it, examples (NoiseSample.noise_scale_low); null when unknown. */
  low: number | null;
}

/** What batchSizeAdvice reads of a window: its step, its network noise scale and its noise measurement (a WindowRecord fits). */
export interface NoiseWindow {
  step: number;
  network: { noise_scale?: number | null };
  noise?: { status: string; noise_scale_low?: number | null } | null;
}

const positive = (v: number | null | undefined): number | null => (typeof v === 'number' && Number.isFinite(v) && v > 0 ? v : null);

/** A window's noise reading: the resolved noise scale, or an unresolved measurement's lower bound. */
export function noiseReading(w: NoiseWindow): NoiseReading {
  return { step: w.step, value: positive(w.network.noise_scale), low: w.noise?.status === 'unresolved' ? positive(w.noise.noise_scale_low) : null };
}

/**
 * One sentence on the batch size, read from what the latest measurements say, when they were taken,
 * and at which step training is now (`nowStep`, null when unknown):
 * - an unresolved latest measurement is not skipped: the mean gradient lost in the noise means the noise
 *   scale is above its lower bound, and a bound well above the batch says larger batches would still pay off
 *   (skipping it used to fall back on an early, resolved value and say the opposite);
 * - resolved values are taken from the latest stretch of training only (steps at least half the latest's),
 *   since the noise scale moves with the loss;
 * - a latest measurement from before a quarter of the steps so far is flagged as early: McCandlish et al.
 *   (2018) report the noise scale growing as the loss falls (from memory: their section 3 and figures on the
 *   growth of the critical batch over training), so an early value likely understates the present one.
 */
export function batchSizeAdvice(readings: readonly NoiseReading[], batchSize: number | null, nowStep: number | null): string {
  const lead =
    'The gradient noise scale estimates the batch size beyond which larger batches give diminishing returns (McCandlish et al. 2018); ' +
    'tidemark measures it at fixed weights, from gradients of disjoint groups of training rows.';
  const resolved = (r: NoiseReading): r is NoiseReading & { value: number } => positive(r.value) !== null;
  const usable = readings.filter((r) => resolved(r) || positive(r.low) !== null);
  if (usable.length === 0) return `${lead} No estimate yet: no noise measurement has resolved the mean gradient from the noise.`;
  const latest = usable[usable.length - 1]!;
  const batch = batchSize !== null && batchSize > 0 ? batchSize : null;
  const tail = ' It is an estimate, and it changes as training goes on; confirm any change of batch size on held-out data.';
  const early =
    nowStep !== null && latest.step < nowStep / 4
      ? ` It was measured at step ${formatCount(latest.step)}, long before step ${formatCount(nowStep)} now; the noise scale tends to grow as the loss falls (McCandlish et al. 2018), so this likely understates it.`
      : '';
  if (!resolved(latest)) {
    const low = latest.low!;
    const est = `The latest measurement (step ${formatCount(latest.step)}) could not tell the mean gradient from the noise: the noise scale is above about ${formatCount(low)} examples`;
    if (batch === null) return `${lead} ${est}; the run's batch size is unknown, so there is nothing to compare it with.${early}${tail}`;
    const verdict =
      low > 2 * batch
        ? `well above the batch size of ${formatCount(batch)}, so larger batches would likely still pay off`
        : low >= batch / 2
          ? `so at least close to the batch size of ${formatCount(batch)}`
          : `which does not yet say how it compares with the batch size of ${formatCount(batch)}`;
    return `${lead} ${est}, ${verdict}.${early}${tail}`;
  }
  const recent = usable.filter((r) => r.step >= latest.step / 2).filter(resolved).slice(-BATCH_ADVICE_RECENT);
  const m = median(recent.map((r) => r.value));
  const from = recent.length === 1 ? `step ${formatCount(recent[0]!.step)}` : `steps ${formatCount(recent[0]!.step)}–${formatCount(latest.step)}`;
  const est = `Median of the last ${recent.length} measurement${recent.length === 1 ? '' : 's'} (${from}): about ${formatCount(m)} examples`;
  if (batch === null) return `${lead} ${est}; the run's batch size is unknown, so there is nothing to compare it with.${early}${tail}`;
  const ratio = m / batch;
  const verdict =
    ratio > 2
      ? `above the batch size of ${formatCount(batch)}, so larger batches would likely still pay off`
      : ratio < 0.5
        ? `below the batch size of ${formatCount(batch)}, so the batch is likely already past the point of full returns`
        : `close to the batch size of ${formatCount(batch)}`;
  return `${lead} ${est}, ${verdict}.${early}${tail}`;
}
