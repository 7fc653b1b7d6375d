import { describe, expect, it } from 'vitest';
import { LTTB } from 'downsample';
import { lttb, lttbPoints } from '../../src/analysis/lttb.js';
import { gaussian, mulberry32 } from '../helpers/random.js';

// Sources:
//  - S. Steinarsson (2013), "Downsampling Time Series for Visual Representation", MSc thesis,
//    University of Iceland, hdl 1946/15343 — the algorithm (methods.md §7).
//  - methods.md §7 check table, rows 1–8, and the hand check for row 3 [computed].
//  - Reference library: downsample 1.4.0 (npm, MIT), `LTTB`, an independent port of the thesis
//    algorithm. Convention differences, established by reading its source and checked below:
//      * thresholds 0, 1, 2 with n > 2: it returns indices [0, 1] (its last index is computed as a
//        sum of bucket sizes, and there are no middle buckets); tidemark returns every index for 0
//        and [0, n−1] for 1 and 2 (methods.md §7 step 1).
//      * it computes the bucket width (n−2)/(threshold−2) in floating point, so ⌊i·width⌋ can fall
//        one short of the exact ⌊i·(n−2)/(threshold−2)⌋; tidemark uses the exact value. When the
//        last boundary falls short, its last output point is n−2 instead of n−1.
//      * NaN values: its bucket pick is left at index −1 and later points are misread, so there is
//        nothing to compare; tidemark's rule is checked on hand-computed cases instead.
//    The library comparison therefore runs only where every bucket boundary agrees.

const indexX = (n: number): number[] => Array.from({ length: n }, (_, i) => i);

/** Indices that downsample's LTTB keeps: it returns the input tuples themselves, so look them up. */
function libraryIndices(xs: ArrayLike<number>, ys: ArrayLike<number>, threshold: number): number[] {
  const data: [number, number][] = [];
  const where = new Map<object, number>();
  for (let i = 0; i < xs.length; i++) {
    const point: [number, number] = [xs[i]!, ys[i]!];
    data.push(point);
    where.set(point, i);
  }
  const out = LTTB(data, threshold);
  const indices: number[] = [];
  for (let i = 0; i < out.length; i++) indices.push(where.get(out[i]!)!);
  return indices;
}

/** True when floating-point and exact bucket boundaries coincide for every middle bucket. */
function boundariesAgree(n: number, threshold: number): boolean {
  const inner = n - 2;
  const buckets = threshold - 2;
  const width = inner / buckets;
  for (let i = 1; i <= buckets; i++) {
    if (Math.floor(i * width) !== Math.floor((i * inner) / buckets)) return false;
  }
  return true;
}

function isStrictlyIncreasing(indices: readonly number[]): boolean {
  for (let i = 1; i < indices.length; i++) if (indices[i]! <= indices[i - 1]!) return false;
  return true;
}

const ROW_1_TO_4_Y = [0, 1, 0, 1, 9, 1, 0, 1, 0, 1];
const ROW_5_TO_6_Y = [0, 2, 4, 3, 1, -1, -3, -2, 0, 5, 1, 0];

describe('lttb', () => {
  describe('methods.md §7 check table [computed]', () => {
    const rows: ReadonlyArray<{ row: number; y: number[]; threshold: number; expected: number[] }> = [
      { row: 1, y: ROW_1_TO_4_Y, threshold: 3, expected: [0, 4, 9] },
      { row: 2, y: ROW_1_TO_4_Y, threshold: 4, expected: [0, 4, 5, 9] },
      { row: 3, y: ROW_1_TO_4_Y, threshold: 5, expected: [0, 2, 4, 6, 9] },
      { row: 4, y: ROW_1_TO_4_Y, threshold: 6, expected: [0, 2, 4, 5, 8, 9] },
      { row: 5, y: ROW_5_TO_6_Y, threshold: 5, expected: [0, 2, 6, 9, 11] },
      { row: 6, y: ROW_5_TO_6_Y, threshold: 6, expected: [0, 2, 5, 6, 9, 11] },
    ];
    for (const { row, y, threshold, expected } of rows) {
      it(`selects ${JSON.stringify(expected)} in row ${row} (threshold ${threshold})`, () => {
        expect(lttb(indexX(y.length), y, threshold)).toEqual(expected);
      });
    }

    it('row 5 keeps the values 0, 4, −3, 5, 0', () => {
      const kept = lttb(indexX(12), ROW_5_TO_6_Y, 5).map((i) => ROW_5_TO_6_Y[i]);
      expect(kept).toEqual([0, 4, -3, 5, 0]);
    });

    it('row 3 hand check: in bucket [1,3) index 2 (area 11/3) beats index 1 (area 1/6)', () => {
      // a = (0,0); c̄ = mean of bucket [3,6) = (4, 11/3). Area = ½·|(aₓ−c̄ₓ)(b_y−a_y) − (aₓ−bₓ)(c̄_y−a_y)|.
      const area = (bx: number, by: number): number => 0.5 * Math.abs((0 - 4) * (by - 0) - (0 - bx) * (11 / 3 - 0));
      expect(area(1, 1)).toBeCloseTo(1 / 6, 14);
      expect(area(2, 0)).toBeCloseTo(11 / 3, 14);
      expect(lttb(indexX(10), ROW_1_TO_4_Y, 5)[1]).toBe(2);
    });

    it('row 7: keeps the spike at 500 and the dip at 777 among 1000 zeros, with both ends', () => {
      const y = new Array<number>(1000).fill(0);
      y[500] = 10;
      y[777] = -10;
      const kept = lttb(indexX(1000), y, 50);
      expect(kept).toHaveLength(50);
      for (const i of [0, 999, 500, 777]) expect(kept).toContain(i);
    });

    it('row 8: reduces 1000 uniform random points to 100 strictly increasing indices', () => {
      const rng = mulberry32(8);
      const y = Array.from({ length: 1000 }, () => rng());
      const kept = lttb(indexX(1000), y, 100);
      expect(kept).toHaveLength(100);
      expect(isStrictlyIncreasing(kept)).toBe(true);
    });
  });

  describe('thresholds outside the bucketed range (methods.md §7 step 1)', () => {
    const y = [3, 1, 4, 1, 5, 9, 2, 6];

    it('returns every index for threshold 0 and for threshold ≥ n', () => {
      for (const threshold of [0, 8, 9, 1000]) expect(lttb(indexX(8), y, threshold)).toEqual(indexX(8));
    });

    it('returns [0, n−1] for thresholds 1 and 2', () => {
      expect(lttb(indexX(8), y, 1)).toEqual([0, 7]);
      expect(lttb(indexX(8), y, 2)).toEqual([0, 7]);
      expect(lttb([0, 1], [5, 6], 1)).toEqual([0, 1]);
    });

    it('handles empty and one-point series', () => {
      expect(lttb([], [], 3)).toEqual([]);
      expect(lttb([7], [1], 1)).toEqual([0]);
      expect(lttb([7], [1], 0)).toEqual([0]);
    });
  });

  describe('properties (methods.md §7)', () => {
    it('returns exactly threshold indices, first and last kept, strictly increasing, for many sizes', () => {
      const rng = mulberry32(77);
      for (const n of [4, 5, 17, 100, 999, 5000]) {
        const ys = Array.from({ length: n }, () => gaussian(rng));
        for (const threshold of [3, 4, 7, Math.floor(n / 2), n - 1]) {
          if (threshold < 3 || threshold >= n) continue;
          const kept = lttb(indexX(n), ys, threshold);
          expect(kept).toHaveLength(threshold);
          expect(kept[0]).toBe(0);
          expect(kept[threshold - 1]).toBe(n - 1);
          expect(isStrictlyIncreasing(kept)).toBe(true);
        }
      }
    });

    it('is deterministic and gives the same answer for arrays and Float64Arrays', () => {
      const rng = mulberry32(5);
      const xs = indexX(2000);
      const ys = xs.map(() => rng());
      const first = lttb(xs, ys, 123);
      expect(lttb(xs, ys, 123)).toEqual(first);
      expect(lttb(Float64Array.from(xs), Float64Array.from(ys), 123)).toEqual(first);
    });

    it('takes the first point when areas tie (strict >)', () => {
      // One bucket [1,4), c̄ = (4,0), a = (0,0): every area is ½·4·|y| = 2, so index 1 wins.
      expect(lttb(indexX(5), [0, 1, -1, 1, 0], 3)).toEqual([0, 1, 4]);
    });

    it('uses the real x values when spacing is uneven', () => {
      // One bucket [1,4), a = (0,0), c̄ = last point (4,4), so area = ½·|−4·y + 4·x| = 2·|x − y|.
      // x = index: (1,3)→4, (2,2)→0, (3,3)→0, index 1 wins.
      // x = [0,3,3.5,3.9,4]: (3,3)→0, (3.5,2)→3, (3.9,3)→1.8, index 2 wins. (hand computation)
      const y = [0, 3, 2, 3, 4];
      expect(lttb(indexX(5), y, 3)).toEqual([0, 1, 4]);
      const uneven = [0, 3, 3.5, 3.9, 4];
      expect(lttb(uneven, y, 3)).toEqual([0, 2, 4]);
      // downsample 1.4.0 agrees on both.
      expect(libraryIndices(indexX(5), y, 3)).toEqual([0, 1, 4]);
      expect(libraryIndices(uneven, y, 3)).toEqual([0, 2, 4]);
    });

    it('keeps isolated spikes and dips at uneven x', () => {
      const rng = mulberry32(11);
      const n = 10_000;
      const xs: number[] = [];
      let x = 0;
      for (let i = 0; i < n; i++) {
        x += 0.1 + rng() * 5;
        xs.push(x);
      }
      const ys = xs.map(() => rng() * 0.01);
      ys[1234] = 50;
      ys[8765] = -50;
      const kept = lttb(xs, ys, 200);
      expect(kept).toContain(1234);
      expect(kept).toContain(8765);
    });
  });

  describe('same output as downsample 1.4.0 LTTB on seeded random series', () => {
    type Series = { name: string; xs: number[]; ys: number[] };
    function series(seed: number, n: number): Series[] {
      const rng = mulberry32(seed);
      const uniform = Array.from({ length: n }, () => rng());
      const walk: number[] = [];
      let w = 0;
      for (let i = 0; i < n; i++) walk.push((w += gaussian(rng)));
      // Small integers make exact area ties common, which exercises the first-wins rule.
      const ties = Array.from({ length: n }, () => Math.floor(rng() * 4));
      const unevenX: number[] = [];
      let x = 0;
      for (let i = 0; i < n; i++) unevenX.push((x += -Math.log(1 - rng())));
      return [
        { name: 'uniform', xs: indexX(n), ys: uniform },
        { name: 'random walk', xs: indexX(n), ys: walk },
        { name: 'small integers', xs: indexX(n), ys: ties },
        { name: 'uneven x', xs: unevenX, ys: walk },
      ];
    }

    const lengths = [5, 10, 57, 100, 1000, 4096, 20_000];
    const thresholdsFor = (n: number): number[] =>
      [3, 4, 5, 7, 10, 33, 100, 500, 2000, Math.floor(n / 3), n - 1].filter((t) => t >= 3 && t < n);

    it('selects identical indices wherever the bucket boundaries agree', () => {
      let compared = 0;
      let skipped = 0;
      for (const [k, n] of lengths.entries()) {
        for (const s of series(1000 + k, n)) {
          for (const threshold of thresholdsFor(n)) {
            if (!boundariesAgree(n, threshold)) {
              skipped++;
              continue;
            }
            const ours = lttb(s.xs, s.ys, threshold);
            expect(ours, `${s.name}, n=${n}, threshold=${threshold}`).toEqual(libraryIndices(s.xs, s.ys, threshold));
            compared++;
          }
        }
      }
      // Most cases must actually be compared, not skipped.
      expect(compared).toBeGreaterThan(150);
      expect(skipped).toBeLessThan(compared / 4);
    });

    it('agrees on threshold ≥ n, and on thresholds 0–2 only for n = 2', () => {
      const rng = mulberry32(3);
      const xs = indexX(50);
      const ys = xs.map(() => rng());
      for (const threshold of [50, 51, 1000]) expect(lttb(xs, ys, threshold)).toEqual(libraryIndices(xs, ys, threshold));
      for (const threshold of [1, 2]) expect(lttb([0, 1], [3, 4], threshold)).toEqual(libraryIndices([0, 1], [3, 4], threshold));
      // Below 3 the library has no middle buckets, and its last index counts bucket sizes (1 + 0),
      // so it returns [0, 1], the first two points. tidemark follows methods.md §7: [0, n−1] for
      // thresholds 1 and 2, every index for 0.
      for (const threshold of [0, 1, 2]) expect(libraryIndices(xs, ys, threshold)).toEqual([0, 1]);
      expect(lttb(xs, ys, 1)).toEqual([0, 49]);
      expect(lttb(xs, ys, 2)).toEqual([0, 49]);
      expect(lttb(xs, ys, 0)).toEqual(xs);
    });

    it('keeps point n−1 where the library’s floating-point boundary drops it (n = 17, threshold = 13)', () => {
      // 11·(15/11) = 14.999999999999998 in binary floating point, so the library's last bucket ends
      // one early and its "last" point is index 15. The exact boundary is 15 + 1 = 16.
      expect(boundariesAgree(17, 13)).toBe(false);
      const xs = indexX(17);
      const ys = xs.map((i) => Math.sin(i * 1.7));
      const library = libraryIndices(xs, ys, 13);
      expect(library[library.length - 1]).toBe(15);
      const ours = lttb(xs, ys, 13);
      expect(ours).toHaveLength(13);
      expect(ours[12]).toBe(16);
      expect(isStrictlyIncreasing(ours)).toBe(true);
    });

    it('keeps point n−2 a candidate: exact last bucket is [14,16) for n = 17, threshold = 13', () => {
      // Exact bounds ⌊i·15/11⌋+1 give [14,16) for the last bucket; floating-point ones give [14,15),
      // which would never consider the spike at 15. (hand computation)
      const ys = new Array<number>(17).fill(0);
      ys[15] = 10;
      const ours = lttb(indexX(17), ys, 13);
      expect(ours.slice(-2)).toEqual([15, 16]);
    });
  });

  describe('non-finite values (tidemark rule, hand-computed)', () => {
    // Row 1 data, one bucket [1,9), a = (0,0), c̄ = (9,1): twice the area is |x − 9y|.
    // Without index 4 the scores are 8, 2, 6, ·, 4, 6, 2, 8: index 1 wins (first of the tie).
    it('never picks a NaN or infinite point while the bucket has a finite one', () => {
      for (const bad of [Number.NaN, Number.POSITIVE_INFINITY, Number.NEGATIVE_INFINITY]) {
        const y = [...ROW_1_TO_4_Y];
        y[4] = bad;
        expect(lttb(indexX(10), y, 3)).toEqual([0, 1, 9]);
      }
      const xs = indexX(10);
      xs[4] = Number.NaN;
      expect(lttb(xs, ROW_1_TO_4_Y, 3)).toEqual([0, 1, 9]);
    });

    it('takes the first index of an all-NaN bucket and keeps the previous anchor', () => {
      // Row 2 buckets [1,5) and [5,9). The first is all NaN → index 1. The anchor stays (0,0), so
      // the second bucket scores |x − 9y| = 4, 6, 2, 8 → index 8.
      const y = [...ROW_1_TO_4_Y];
      for (let i = 1; i < 5; i++) y[i] = Number.NaN;
      expect(lttb(indexX(10), y, 4)).toEqual([0, 1, 8, 9]);
    });

    it('scores by distance in y from the anchor when the next bucket has no finite point', () => {
      // Row 2 with [5,9) all NaN: bucket [1,5) scores |y − 0| = 1, 0, 1, 9 → index 4; then [5,9) → 5.
      const y = [...ROW_1_TO_4_Y];
      for (let i = 5; i < 9; i++) y[i] = Number.NaN;
      expect(lttb(indexX(10), y, 4)).toEqual([0, 4, 5, 9]);
    });

    it('scores by distance from the next-bucket mean when point 0 is NaN', () => {
      // Row 2 with y[0] = NaN: c̄_y of [5,9) is 0.5, so [1,5) scores 0.5, 0.5, 0.5, 8.5 → index 4.
      // Anchor (4,9), c̄ = (9,1): twice the area |−5(y−9) + 8(4−x)| = 32, 29, 16, 13 → index 5.
      const y = [...ROW_1_TO_4_Y];
      y[0] = Number.NaN;
      expect(lttb(indexX(10), y, 4)).toEqual([0, 4, 5, 9]);
    });

    it('still returns threshold strictly increasing indices for an all-NaN series', () => {
      const y = new Array<number>(100).fill(Number.NaN);
      const kept = lttb(indexX(100), y, 10);
      expect(kept).toHaveLength(10);
      expect(kept[0]).toBe(0);
      expect(kept[9]).toBe(99);
      expect(isStrictlyIncreasing(kept)).toBe(true);
    });
  });

  describe('argument checks', () => {
    it('throws a coded RangeError when the lengths differ', () => {
      expect(() => lttb([0, 1, 2], [0, 1], 2)).toThrow(
        expect.objectContaining({
          name: 'TidemarkRangeError',
          code: 'TIDEMARK_ERR_OPTION_INVALID',
          message: 'lttb: xs has 3 values but ys has 2; pass one y per x.',
        }),
      );
    });

    it('throws a coded RangeError for a negative, fractional or NaN threshold', () => {
      for (const threshold of [-1, 2.5, Number.NaN, Number.POSITIVE_INFINITY]) {
        expect(() => lttb([0, 1, 2], [0, 1, 2], threshold)).toThrow(RangeError);
        expect(() => lttb([0, 1, 2], [0, 1, 2], threshold)).toThrow(
          expect.objectContaining({
            code: 'TIDEMARK_ERR_OPTION_INVALID',
            message: `lttb: threshold must be a non-negative integer, received ${String(threshold)}; use 0 to keep every point.`,
          }),
        );
      }
    });
  });
});

describe('lttbPoints', () => {
  it('returns the same point objects lttb selects, using step as x and value as y', () => {
    const points = ROW_5_TO_6_Y.map((value, step) => ({ step, value, layer: 'dense_1' }));
    const kept = lttbPoints(points, 6);
    expect(kept.map((p) => p.step)).toEqual([0, 2, 5, 6, 9, 11]);
    expect(kept[1]).toBe(points[2]);
  });
});
