/**
 * The batch-size sentence from noise measurements. The comparison of the noise scale with the batch size is
 * McCandlish et al. (2018, "An Empirical Model of Large-Batch Training", eq. 2.8 and §2.3: steps fall as
 * 1 + B_noise/B); the ×2 and ×½ thresholds are common practice, no source. The readings below are shaped
 * like the gearbox depth sweep's stored measurements (a resolved value near 12 at step 8, later ones
 * unresolved with lower bounds of a few hundred examples).
 */
import { describe, expect, it } from 'vitest';
import { batchSizeAdvice, type NoiseReading } from '../../src/analysis/batch-size-advice.js';

const r = (step: number, value: number | null, low: number | null = null): NoiseReading => ({ step, value, low });

describe('batchSizeAdvice', () => {
  it('reads an unresolved latest measurement as a lower bound instead of falling back on an early value', () => {
    const s = batchSizeAdvice([r(8, 11.8, 9), r(1200, null, 423), r(2100, null, 727)], 64, 2250);
    expect(s).toContain('The latest measurement (step 2,100) could not tell the mean gradient from the noise: the noise scale is above about 727 examples');
    expect(s).toContain('well above the batch size of 64, so larger batches would likely still pay off');
    expect(s).not.toContain('past the point of full returns');
    expect(s).not.toContain('long before');
    // A bound under half the batch says nothing either way; one near the batch says "at least close".
    expect(batchSizeAdvice([r(100, null, 20)], 64, 100)).toContain('which does not yet say how it compares with the batch size of 64');
    expect(batchSizeAdvice([r(100, null, 40)], 64, 100)).toContain('so at least close to the batch size of 64');
  });

  it('takes the median of resolved values from the latest stretch of training only', () => {
    // Steps ≥ 2000/2 = 1000: 400, 500, 600 → median 500; the value 12 at step 8 is left out.
    const s = batchSizeAdvice([r(8, 12), r(1000, 400), r(1500, 500), r(2000, 600)], 64, 2000);
    expect(s).toContain('Median of the last 3 measurements (steps 1,000–2,000): about 500 examples, above the batch size of 64');
    expect(batchSizeAdvice([r(1000, 20), r(2000, 24)], 64, 2000)).toContain('about 22 examples, below the batch size of 64, so the batch is likely already past the point of full returns');
    expect(batchSizeAdvice([r(2000, 80)], 64, 2000)).toContain('close to the batch size of 64');
  });

  it('flags a latest measurement taken long before the current step', () => {
    // The demo at default settings: one measurement, at step 8 of 6000.
    const s = batchSizeAdvice([r(8, 11.8)], 64, 6000);
    expect(s).toContain('It was measured at step 8, long before step 6,000 now');
    expect(s).toContain('so this likely understates it');
    expect(batchSizeAdvice([r(1600, 500)], 64, 6000)).not.toContain('long before');
  });

  it('says when there is nothing to go on', () => {
    expect(batchSizeAdvice([], 64, 10)).toContain('No estimate yet');
    expect(batchSizeAdvice([r(10, null, null)], 64, 10)).toContain('No estimate yet');
    expect(batchSizeAdvice([r(10, 50)], null, 10)).toContain("the run's batch size is unknown");
  });
});
