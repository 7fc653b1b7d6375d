import { median as ssMedian } from 'simple-statistics';
import { describe, expect, it } from 'vitest';
import { RollingMedian, sortedMedian } from '../../src/analysis/rolling-median.js';
import { mulberry32 } from '../helpers/random.js';

describe('RollingMedian', () => {
  it('equals the median of the last `capacity` values, checked against simple-statistics at every step', () => {
    const rng = mulberry32(5);
    for (const capacity of [1, 2, 7, 16, 64]) {
      const m = new RollingMedian(capacity);
      const all: number[] = [];
      for (let i = 0; i < 300; i++) {
        // Ties on purpose: values from a small set.
        const v = i % 3 === 0 ? Math.floor(rng() * 5) : rng() * 10 - 5;
        m.push(v);
        all.push(v);
        expect(m.median(), `capacity ${capacity}, step ${i}`).toBe(ssMedian(all.slice(-capacity)));
        expect(m.recent(0)).toBe(v);
      }
      expect(m.size).toBe(capacity);
      expect(m.pushed).toBe(300);
    }
  });

  it('is NaN when empty, and refuses a capacity below 1', () => {
    expect(new RollingMedian(4).median()).toBeNaN();
    expect(sortedMedian([1, 2, 3, 10], 4)).toBe(2.5);
    expect(() => new RollingMedian(0)).toThrow(RangeError);
  });
});
