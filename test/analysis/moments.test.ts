import { describe, expect, it } from 'vitest';
import { mean as ssMean, sampleVariance as ssSampleVariance } from 'simple-statistics';
import {
  ShiftedMoments,
  countNonFinite,
  emptyMoments,
  mergeMoments,
  populationVariance,
  sampleVariance,
  welfordPush,
  type Moments,
} from '../../src/analysis/moments.js';
import { gaussian, mulberry32 } from '../helpers/random.js';

// Sources (methods.md §4):
//  - B. P. Welford (1962), "Note on a method for calculating corrected sums of squares and products",
//    Technometrics 4(3):419–420 — the running update.
//  - T. F. Chan, G. H. Golub, R. J. LeVeque (1982), "Updating formulae and a pairwise algorithm for
//    computing sample variances", COMPSTAT 1982, pp. 30–41 — the pairwise merge.
//  - Reference library: simple-statistics (npm), `mean` and `sampleVariance` (two-pass, ddof 1).

function momentsOf(xs: readonly number[]): Moments {
  const m = emptyMoments();
  for (const x of xs) welfordPush(m, x);
  return m;
}

/** Naive one-pass formula (Σx² − (Σx)²/n)/(n−1) with every intermediate rounded to float32
 *  (methods.md §4 TS note: wrap each op in Math.fround to mimic NumPy float32 scalars). */
function naiveVarianceFloat32(xs: readonly number[]): number {
  const f = Math.fround;
  const n = xs.length;
  let s = 0;
  let q = 0;
  for (const x0 of xs) {
    const x = f(x0);
    s = f(s + x);
    q = f(q + f(x * x));
  }
  return f(f(q - f(f(s * s) / n)) / (n - 1));
}

/** The same naive formula in plain float64 (JS number) arithmetic. */
function naiveVarianceFloat64(xs: readonly number[]): number {
  const n = xs.length;
  let s = 0;
  let q = 0;
  for (const x of xs) {
    s += x;
    q += x * x;
  }
  return (q - (s * s) / n) / (n - 1);
}

const BASE = [4, 7, 13, 16] as const;
const shifted = (offset: number): number[] => BASE.map((v) => v + offset);

describe('welfordPush', () => {
  it('gives mean 10, M2 90, sample variance 30 and population variance 22.5 for {4, 7, 13, 16}', () => {
    // methods.md §4 check row 1 [computed]; Welford (1962) update.
    const m = momentsOf(BASE);
    expect(m.n).toBe(4);
    expect(m.mean).toBe(10);
    expect(m.m2).toBe(90);
    expect(sampleVariance(m)).toBe(30);
    expect(populationVariance(m)).toBe(22.5);
  });

  it('returns exactly 30 for {4,7,13,16} shifted by 1e8 and 1e9 in float64', () => {
    // methods.md §4 rows 7–8 [computed]: Welford → 30.
    expect(sampleVariance(momentsOf(shifted(1e8)))).toBe(30);
    expect(sampleVariance(momentsOf(shifted(1e9)))).toBe(30);
  });

  it('reports NaN sample variance below two values', () => {
    // M2/(n−1) is undefined for n < 2 (Welford 1962; definition of the unbiased estimator).
    expect(sampleVariance(emptyMoments())).toBeNaN();
    expect(sampleVariance(momentsOf([5]))).toBeNaN();
    expect(populationVariance(momentsOf([5]))).toBe(0);
  });
});

describe('mergeMoments', () => {
  it('merges {4,7} and {13,16} into (4, 10, 90)', () => {
    // methods.md §4 check row 2 [computed]; Chan, Golub & LeVeque (1982) pairwise merge.
    const a = momentsOf([4, 7]);
    const b = momentsOf([13, 16]);
    expect(a).toEqual({ n: 2, mean: 5.5, m2: 4.5 });
    expect(b).toEqual({ n: 2, mean: 14.5, m2: 4.5 });
    const ab = mergeMoments(a, b);
    expect(ab).toEqual({ n: 4, mean: 10, m2: 90 });
    expect(sampleVariance(ab)).toBe(30);
  });

  it('merges {1,2,3} and {10,20} into (5, 7.2, 254.8) with sample variance 63.7 and population variance 50.96', () => {
    // methods.md §4 check row 3 [computed]; Chan, Golub & LeVeque (1982).
    const a = momentsOf([1, 2, 3]);
    const b = momentsOf([10, 20]);
    expect(a).toEqual({ n: 3, mean: 2, m2: 2 });
    expect(b).toEqual({ n: 2, mean: 15, m2: 50 });
    const ab = mergeMoments(a, b);
    expect(ab.n).toBe(5);
    expect(ab.mean).toBeCloseTo(7.2, 12);
    expect(ab.m2).toBeCloseTo(254.8, 11);
    expect(sampleVariance(ab)).toBeCloseTo(63.7, 12);
    expect(populationVariance(ab)).toBeCloseTo(50.96, 12);
    // "Direct computation agrees": one Welford pass over all five values.
    const direct = momentsOf([1, 2, 3, 10, 20]);
    expect(direct.mean).toBeCloseTo(ab.mean, 12);
    expect(direct.m2).toBeCloseTo(ab.m2, 10);
  });

  it('gives the same result in any order and grouping of merges, equal to a single pass', () => {
    // Chan, Golub & LeVeque (1982): exact in exact arithmetic and independent of merge order
    // (methods.md §4); in float64 we allow relative round-off of 1e-12.
    const rng = mulberry32(1982);
    const chunks = [7, 1, 30, 12, 2].map((len) =>
      Array.from({ length: len }, () => 1000 + 25 * gaussian(rng)),
    );
    const parts = chunks.map(momentsOf);
    const all = momentsOf(chunks.flat());
    const [p0, p1, p2, p3, p4] = parts as [Moments, Moments, Moments, Moments, Moments];
    const orders: Moments[] = [
      mergeMoments(mergeMoments(mergeMoments(mergeMoments(p0, p1), p2), p3), p4),
      mergeMoments(p4, mergeMoments(p3, mergeMoments(p2, mergeMoments(p1, p0)))),
      mergeMoments(mergeMoments(p0, p4), mergeMoments(mergeMoments(p2, p1), p3)),
      mergeMoments(mergeMoments(p3, p1), mergeMoments(p4, mergeMoments(p0, p2))),
    ];
    for (const r of orders) {
      expect(r.n).toBe(all.n);
      expect(Math.abs(r.mean - all.mean) / Math.abs(all.mean)).toBeLessThan(1e-12);
      expect(Math.abs(r.m2 - all.m2) / all.m2).toBeLessThan(1e-12);
    }
    // Merging with an empty accumulator is the identity.
    expect(mergeMoments(p2, emptyMoments())).toEqual(p2);
    expect(mergeMoments(emptyMoments(), p2)).toEqual(p2);
    expect(mergeMoments(emptyMoments(), emptyMoments()).n).toBe(0);
  });
});

describe('countNonFinite', () => {
  it('counts NaN and both infinities and nothing else', () => {
    // Definition (IEEE 754 non-finite values); no outside value needed.
    expect(countNonFinite(new Float32Array([1, 2, 3]))).toBe(0);
    expect(countNonFinite([])).toBe(0);
    expect(countNonFinite([1, Number.NaN, 2, Infinity, -Infinity, 0])).toBe(3);
    expect(countNonFinite(new Float32Array([Number.NaN, Number.NaN]))).toBe(2);
    // Finite values whose float64 sum overflows are still finite entries.
    expect(countNonFinite([1e308, 1e308, -1e308])).toBe(0);
    expect(countNonFinite([Infinity, -Infinity])).toBe(2);
  });
});

describe('ShiftedMoments', () => {
  it('reproduces the naive float32 failures of methods.md §4 rows 4–6 (0.0, 32.0, 0.0)', () => {
    // methods.md §4 rows 4–6 [computed, NumPy float32 scalars, one rounding per op]:
    // the reference below must reproduce them, otherwise the next test proves nothing.
    expect(naiveVarianceFloat32(shifted(1e5))).toBe(0);
    expect(naiveVarianceFloat32(shifted(1e4))).toBe(32);
    expect(naiveVarianceFloat32(shifted(1e6))).toBe(0);
  });

  it('keeps float32 data with a large offset exact where the naive formula returns 0', () => {
    // methods.md §4 rows 4–6 [computed]: the correct sample variance is 30 for each offset.
    // Our accumulator keeps float64 sums of deviations from the first vector, fed float32 data.
    for (const offset of [1e4, 1e5, 1e6]) {
      const data = new Float32Array(shifted(offset));
      expect(Array.from(data)).toEqual(shifted(offset)); // all exact in float32 (methods.md row 4)
      const acc = new ShiftedMoments(1);
      for (const x of data) acc.push(new Float32Array([x]));
      expect(acc.count).toBe(4);
      expect(acc.varianceTrace()).toBe(30);
      expect(acc.mean()[0]).toBe(offset + 10);
    }
  });

  it('sums per-coordinate variances when each coordinate carries a different float32 offset', () => {
    // methods.md §4 rows 4–6 and row 9 [computed]: variance 30 per coordinate, so the trace is 4·30.
    // Row 9 (offset 1e7): float32 Welford gives 28.67, our float64 shifted sums stay exact.
    const offsets = [1e4, 1e5, 1e6, 1e7];
    const acc = new ShiftedMoments(offsets.length);
    for (const v of BASE) acc.push(new Float32Array(offsets.map((o) => o + v)));
    expect(acc.varianceTrace()).toBe(120);
    expect(Array.from(acc.mean())).toEqual(offsets.map((o) => o + 10));
  });

  it('gives 30 where the naive float64 formula gives 29.333… and −170.67', () => {
    // methods.md §4 rows 7–8 [computed; same example recalled from the Wikipedia article
    // "Algorithms for calculating variance", memory].
    expect(naiveVarianceFloat64(shifted(1e8))).toBe(29.333333333333332);
    expect(naiveVarianceFloat64(shifted(1e9))).toBe(-170.66666666666666);
    for (const offset of [1e8, 1e9]) {
      const acc = new ShiftedMoments(1);
      for (const x of shifted(offset)) acc.push([x]);
      expect(acc.varianceTrace()).toBe(30);
      expect(acc.mean()[0]).toBe(offset + 10);
    }
  });

  it('agrees with simple-statistics mean and sampleVariance on random vectors', () => {
    // Reference library: simple-statistics `mean` and `sampleVariance` (ddof 1), per coordinate.
    const rng = mulberry32(7);
    const size = 9;
    const count = 257;
    const offsets = Array.from({ length: size }, (_, j) => (j - 4) * 1000);
    const scales = Array.from({ length: size }, (_, j) => 0.01 * 3 ** j);
    const columns: number[][] = Array.from({ length: size }, () => []);
    const acc = new ShiftedMoments(size);
    for (let i = 0; i < count; i++) {
      const row = new Float32Array(size);
      for (let j = 0; j < size; j++) row[j] = offsets[j]! + scales[j]! * gaussian(rng);
      for (let j = 0; j < size; j++) columns[j]!.push(row[j]!);
      acc.push(row);
    }
    expect(acc.count).toBe(count);
    const mean = acc.mean();
    let trace = 0;
    let meanSq = 0;
    for (let j = 0; j < size; j++) {
      const refMean = ssMean(columns[j]!);
      const refVar = ssSampleVariance(columns[j]!);
      expect(Math.abs(mean[j]! - refMean)).toBeLessThanOrEqual(1e-12 * Math.max(1, Math.abs(refMean)));
      trace += refVar;
      meanSq += refMean * refMean;
    }
    expect(Math.abs(acc.varianceTrace() - trace) / trace).toBeLessThan(1e-9);
    expect(Math.abs(acc.meanSquaredNorm() - meanSq) / meanSq).toBeLessThan(1e-12);
  });

  it('reports NaN variance below two vectors and starts over after reset', () => {
    // Unbiased variance (ddof 1) is undefined for fewer than two samples (methods.md §1.4 definition).
    const acc = new ShiftedMoments(2);
    expect(acc.size).toBe(2);
    expect(acc.varianceTrace()).toBeNaN();
    acc.push([1, 2]);
    expect(acc.varianceTrace()).toBeNaN();
    expect(Array.from(acc.mean())).toEqual([1, 2]);
    acc.push([3, 4]);
    // Two points a, b: variance (a−b)²/2 per coordinate → 2 + 2.
    expect(acc.varianceTrace()).toBe(4);
    acc.reset();
    expect(acc.count).toBe(0);
    expect(acc.varianceTrace()).toBeNaN();
    // After reset the new first vector becomes the shift; old data must not leak in.
    acc.push([1e6, -1e6]);
    acc.push([1e6 + 2, -1e6 + 2]);
    acc.push([1e6 + 4, -1e6 + 4]);
    expect(Array.from(acc.mean())).toEqual([1e6 + 2, -1e6 + 2]);
    expect(acc.varianceTrace()).toBe(8); // {0,2,4} has sample variance 4, two coordinates
    expect(acc.meanSquaredNorm()).toBe((1e6 + 2) ** 2 + (-1e6 + 2) ** 2);
  });

  it('rejects a vector of the wrong length', () => {
    // API contract: every pushed vector has `size` entries.
    const acc = new ShiftedMoments(3);
    expect(() => acc.push([1, 2])).toThrow(RangeError);
  });
});

describe('ShiftedMoments.pushBlock', () => {
  // The block form must give the same per-coordinate mean and unbiased variance as pushing the
  // vectors one by one (and as simple-statistics on the same numbers).
  const rng = mulberry32(31);
  const vectors = Array.from({ length: 11 }, () => Float32Array.from({ length: 37 }, () => 5 + gaussian(rng)));

  it('matches one-by-one pushes for blocks of 4 and of other sizes', () => {
    const one = new ShiftedMoments(37);
    for (const v of vectors) one.push(v);
    const blocks = new ShiftedMoments(37);
    expect(blocks.pushBlock(vectors.slice(0, 4))).toBe(true);
    expect(blocks.pushBlock(vectors.slice(4, 8))).toBe(true);
    expect(blocks.pushBlock(vectors.slice(8, 11))).toBe(true);
    expect(blocks.count).toBe(11);
    expect(blocks.meanSquaredNorm()).toBeCloseTo(one.meanSquaredNorm(), 10);
    expect(blocks.varianceTrace() / one.varianceTrace()).toBeCloseTo(1, 12);
    const col = vectors.map((v) => v[5]!);
    expect(blocks.mean()[5]).toBeCloseTo(ssMean(col), 12);
    expect(blocks.varianceTrace()).toBeGreaterThan(0);
    expect(ssSampleVariance(col)).toBeGreaterThan(0);
  });

  it('adds nothing and says so when a value is NaN or infinite', () => {
    const m = new ShiftedMoments(37);
    m.pushBlock(vectors.slice(0, 4));
    const before = { n: m.count, ms: m.meanSquaredNorm(), vt: m.varianceTrace() };
    const bad = vectors.slice(4, 8).map((v) => Float32Array.from(v));
    bad[2]![30] = Number.NaN;
    expect(m.pushBlock(bad)).toBe(false);
    expect(m.count).toBe(before.n);
    expect(m.meanSquaredNorm()).toBeCloseTo(before.ms, 10);
    expect(m.varianceTrace()).toBeCloseTo(before.vt, 10);
    const inf = vectors.slice(0, 4).map((v) => Float32Array.from(v));
    inf[0]![0] = Infinity;
    const fresh = new ShiftedMoments(37);
    expect(fresh.pushBlock(inf)).toBe(false);
    expect(fresh.count).toBe(0);
  });

  it('takes a block back with unpushBlock', () => {
    const m = new ShiftedMoments(37);
    m.pushBlock(vectors.slice(0, 4));
    const ref = { ms: m.meanSquaredNorm(), vt: m.varianceTrace() };
    m.pushBlock(vectors.slice(4, 8));
    m.unpushBlock(vectors.slice(4, 8));
    expect(m.count).toBe(4);
    expect(m.meanSquaredNorm()).toBeCloseTo(ref.ms, 9);
    expect(m.varianceTrace() / ref.vt).toBeCloseTo(1, 9);
  });
});

describe('ShiftedMoments successive differences', () => {
  it('give half the mean squared consecutive difference within blocks (von Neumann et al. 1941, from memory)', () => {
    // Two blocks of 4 one-coordinate values: pairs (1,3),(3,2),(2,6) and (5,5),(5,7),(7,4):
    // squared differences 4, 1, 16, 0, 4, 9 → sum 34 over 6 pairs → 34/12 [computed by hand].
    const m = new ShiftedMoments(1);
    expect(m.pushBlock([[1], [3], [2], [6]])).toBe(true);
    expect(m.pushBlock([[5], [5], [7], [4]])).toBe(true);
    expect(m.diffPairs).toBe(6);
    expect(m.successiveDiffTrace()).toBeCloseTo(34 / 12, 12);
    // A block taken back removes its pairs; a short block (3 values) adds 2 pairs.
    m.unpushBlock([[5], [5], [7], [4]]);
    expect(m.successiveDiffTrace()).toBeCloseTo(21 / 6, 12);
    expect(m.pushBlock([[0], [2], [2]])).toBe(true);
    expect(m.successiveDiffTrace()).toBeCloseTo((21 + 4) / 10, 12);
    m.reset();
    expect(m.successiveDiffTrace()).toBeNaN();
  });

  it('estimate the variance trace of independent draws whose mean drifts, where the plain variance does not', () => {
    // 400 draws of 3 coordinates, unit variance each (trace 3), around a mean that moves by 0.05 a draw:
    // the sample variance holds the drift (≈ 0.05²·400²/12 per coordinate on top), the successive
    // differences only 0.05²/2 of it.
    const rng = mulberry32(8);
    const m = new ShiftedMoments(3);
    for (let b = 0; b < 100; b++) {
      m.pushBlock(Array.from({ length: 4 }, (_, k) => [0, 1, 2].map(() => 0.05 * (4 * b + k) + gaussian(rng))));
    }
    expect(Math.abs(m.successiveDiffTrace() / 3 - 1)).toBeLessThan(0.12);
    expect(m.varianceTrace() / 3).toBeGreaterThan(30); // 1 + (0.05·400)²/12 = 34.3 per coordinate
  });
});

