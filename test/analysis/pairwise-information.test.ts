import { describe, expect, it } from 'vitest';
import { gaussianMixtureEntropyBounds, pairwiseInformationBounds } from '../../src/analysis/pairwise-information.js';
import { gaussian, mulberry32 } from '../helpers/random.js';

// Sources:
//  - A. Kolchinsky & B. D. Tracey (2017), "Estimating Mixture Entropy with Pairwise Distances", Entropy 19(7):361:
//    KL-based upper and Bhattacharyya-based lower bounds on Gaussian-mixture entropy [verified: abstract, per
//    methods.md §6.2; the exact estimator formula is from memory there].
//  - methods.md §6.3 check values [computed with NumPy/SciPy]: the 1-D two-component mixture table, the
//    unit-square and two-point tables, identical and well-separated points, the I(T;Y) = ln 2 example.
//  - The quadrature values are recomputed here with Simpson's rule and compared with methods.md's.
//  - Cover & Thomas, Elements of Information Theory (2006), Example 8.1.2: h(N(0,σ²)) = ½ ln(2πeσ²)
//    (example number from memory; value 1.4189385332 nats at σ = 1, methods.md §6.3 [computed]).

const LN2 = Math.LN2;

/** −∫ p ln p for the equal mixture of N(μ_i, σ²) in 1-D, Simpson's rule over μ_min − 14σ … μ_max + 14σ. */
function mixtureEntropyQuadrature(means: number[], sigma: number): number {
  const lo = Math.min(...means) - 14 * sigma;
  const hi = Math.max(...means) + 14 * sigma;
  const n = 40_000; // even
  const h = (hi - lo) / n;
  const norm = 1 / (means.length * sigma * Math.sqrt(2 * Math.PI));
  const f = (x: number): number => {
    let p = 0;
    for (const m of means) p += Math.exp(-((x - m) ** 2) / (2 * sigma * sigma));
    p *= norm;
    return p > 0 ? -p * Math.log(p) : 0;
  };
  let s = f(lo) + f(hi);
  for (let i = 1; i < n; i++) s += (i % 2 === 1 ? 4 : 2) * f(lo + i * h);
  return (s * h) / 3;
}

const nats = (bits: number): number => bits * LN2;

describe('gaussianMixtureEntropyBounds: ½N(0,1) + ½N(Δ,1) (Kolchinsky & Tracey 2017; methods.md §6.3)', () => {
  const table: Array<[number, number, number, number]> = [
    // Δ, true H (quadrature), KL upper, Bhattacharyya lower — nats
    [0, 1.418939, 1.418939, 1.418939],
    [1, 1.53036, 1.638009, 1.479487],
    [2, 1.755769, 1.985158, 1.638009],
    [4, 2.051659, 2.11175, 1.985158],
    [8, 2.111992, 2.112086, 2.11175],
  ];

  for (const [delta, truth, upper, lower] of table) {
    it(`gives upper ${upper} and lower ${lower} nats at Δ = ${delta}, bracketing the quadrature ${truth}`, () => {
      const b = gaussianMixtureEntropyBounds([0, delta], [2, 1], 1);
      expect(Math.abs(b.upper - upper)).toBeLessThan(1e-5);
      expect(Math.abs(b.lower - lower)).toBeLessThan(1e-5);
      expect(b.conditional).toBeCloseTo(1.4189385332, 9);
      const q = mixtureEntropyQuadrature([0, delta], 1);
      expect(Math.abs(q - truth)).toBeLessThan(1e-5);
      expect(b.lower).toBeLessThanOrEqual(q + 1e-12);
      expect(q).toBeLessThanOrEqual(b.upper + 1e-12);
    });
  }

  it('tends to H(X|C) + ln 2 for far-apart components', () => {
    const b = gaussianMixtureEntropyBounds([0, 40], [2, 1], 1);
    expect(b.upper).toBeCloseTo(1.4189385332 + LN2, 9);
    expect(b.lower).toBeCloseTo(1.4189385332 + LN2, 9);
  });

  it('stays within [H(X|C), H(X|C) + H(C)] with unequal weights (the estimator property, from memory)', () => {
    const w = [0.7, 0.2, 0.1];
    const hc = -w.reduce((s, c) => s + c * Math.log(c), 0);
    for (const spread of [0, 0.5, 2, 50]) {
      const b = gaussianMixtureEntropyBounds([0, 0, spread, 0, 0, spread], [3, 2], 0.5, w);
      expect(b.lower).toBeGreaterThanOrEqual(b.conditional - 1e-12);
      expect(b.upper).toBeLessThanOrEqual(b.conditional + hc + 1e-12);
      expect(b.lower).toBeLessThanOrEqual(b.upper + 1e-12);
    }
  });
});

describe('pairwiseInformationBounds on I(X;T) for T = h(X) + N(0, σ²I) (methods.md §6.2–6.3)', () => {
  it('reproduces the unit-square table to 1e-5 nats', () => {
    const square = [0, 0, 1, 0, 0, 1, 1, 1];
    const zeros = [0, 0, 0, 0];
    const table: Array<[number, number, number]> = [
      [0.1, 1.386294, 1.386287],
      [0.5, 1.132438, 0.43814],
      [1.0, 0.43814, 0.121096],
    ];
    for (const [sigma, upper, lower] of table) {
      const r = pairwiseInformationBounds(square, [4, 2], zeros, { noiseVariance: sigma * sigma });
      expect(Math.abs(nats(r.mi_input_upper) - upper)).toBeLessThan(1e-5);
      expect(Math.abs(nats(r.mi_input_lower) - lower)).toBeLessThan(1e-5);
    }
    // And in bits at σ = 0.5 (methods.md: 1.633763 and 0.632103 bits).
    const half = pairwiseInformationBounds(square, [4, 2], zeros, { noiseVariance: 0.25 });
    expect(half.mi_input_upper).toBeCloseTo(1.633763, 5);
    expect(half.mi_input_lower).toBeCloseTo(0.632103, 5);
  });

  it('reproduces the two-point table and brackets the quadrature I(X;T) = H(T) − H(T|X)', () => {
    const table: Array<[number, number, number, number]> = [
      [0.5, 0.566219, 0.21907, 0.336831],
      [1.0, 0.21907, 0.060548, 0.111421],
    ];
    for (const [sigma, upper, lower, truth] of table) {
      const r = pairwiseInformationBounds([0, 1], [2, 1], [0, 0], { noiseVariance: sigma * sigma });
      expect(Math.abs(nats(r.mi_input_upper) - upper)).toBeLessThan(1e-5);
      expect(Math.abs(nats(r.mi_input_lower) - lower)).toBeLessThan(1e-5);
      const q = mixtureEntropyQuadrature([0, 1], sigma) - 0.5 * Math.log(2 * Math.PI * Math.E * sigma * sigma);
      expect(Math.abs(q - truth)).toBeLessThan(1e-5);
      expect(nats(r.mi_input_lower)).toBeLessThan(q);
      expect(q).toBeLessThan(nats(r.mi_input_upper));
    }
  });

  it('gives 0 for identical points and ln P for well-separated ones', () => {
    const same = pairwiseInformationBounds(new Float32Array(12).fill(0.7), [4, 3], [0, 1, 0, 1], { noiseVariance: 0.1 });
    expect(same.mi_input_upper).toBeCloseTo(0, 12);
    expect(same.mi_input_lower).toBeCloseTo(0, 12);
    expect(same.mi_label).toBeCloseTo(0, 12);
    // methods.md §6.3: h = {0, 10, 20, 30}, σ = 0.1 → both bounds ln 4 = 1.386294 nats.
    const far = pairwiseInformationBounds([0, 10, 20, 30], [4, 1], [0, 0, 0, 0], { noiseVariance: 0.01 });
    expect(nats(far.mi_input_upper)).toBeCloseTo(1.386294, 6);
    expect(nats(far.mi_input_lower)).toBeCloseTo(1.386294, 6);
    expect(far.saturated).toBe(true);
    expect(same.saturated).toBe(false);
  });

  it('satisfies upper(σ) = lower(σ/2) (KL = ‖Δμ‖²/2σ², Bhattacharyya = ‖Δμ‖²/8σ²)', () => {
    const rng = mulberry32(3);
    const acts = Float64Array.from({ length: 60 * 7 }, () => gaussian(rng));
    const labels = Array.from({ length: 60 }, (_, i) => i % 3);
    for (const v of [0.05, 0.3, 2]) {
      const a = pairwiseInformationBounds(acts, [60, 7], labels, { noiseVariance: v });
      const b = pairwiseInformationBounds(acts, [60, 7], labels, { noiseVariance: v / 4 });
      expect(a.mi_input_upper).toBeCloseTo(b.mi_input_lower, 12);
      expect(a.mi_input_lower).toBeLessThanOrEqual(a.mi_input_upper);
      expect(a.mi_input_upper).toBeLessThanOrEqual(Math.log2(60) + 1e-12);
      expect(a.mi_input_lower).toBeGreaterThanOrEqual(0);
    }
  });

  it('estimates I(T;Y) = ln 2 for h = {0, 0.1, 5, 5.1}, y = {0, 0, 1, 1}, σ = 0.1 (methods.md §6.3)', () => {
    const r = pairwiseInformationBounds([0, 0.1, 5, 5.1], [4, 1], [0, 0, 1, 1], { noiseVariance: 0.01 });
    expect(nats(r.mi_label)).toBeCloseTo(0.693147, 6);
    expect(r.mi_label).toBeCloseTo(1, 12);
  });

  it('drops rows with NaN, and subsamples above maxRows with a seeded, repeatable choice', () => {
    const r = pairwiseInformationBounds([0, Number.NaN, 10, 20], [4, 1], [0, 0, 1, 1], { noiseVariance: 0.01 });
    expect(r.dropped).toBe(1);
    expect(r.rows).toBe(3);
    expect(r.mi_input_upper).toBeCloseTo(Math.log2(3), 12);

    const rng = mulberry32(8);
    const rows = 300;
    const acts = Float64Array.from({ length: rows * 4 }, () => gaussian(rng));
    const labels = Array.from({ length: rows }, (_, i) => i % 2);
    const a = pairwiseInformationBounds(acts, [rows, 4], labels, { maxRows: 100, seed: 7 });
    const b = pairwiseInformationBounds(acts, [rows, 4], labels, { maxRows: 100, seed: 7 });
    expect(a).toEqual(b);
    expect(a).toMatchObject({ rows: 100, subsampled: true, noise_variance: 0.1, estimator: 'pairwise-kolchinsky-tracey' });
    expect(a.mi_input_upper).toBeLessThanOrEqual(Math.log2(100) + 1e-12);
    const all = pairwiseInformationBounds(acts, [rows, 4], labels, {});
    expect(all).toMatchObject({ rows, subsampled: false });
  });

  it('rejects a noise variance that is not > 0, a bad shape, labels of another length, and misspelt options', () => {
    for (const noiseVariance of [-0.1, 0, Number.NaN, Number.POSITIVE_INFINITY]) {
      expect(() => pairwiseInformationBounds([0, 1], [2, 1], [0, 0], { noiseVariance })).toThrow(
        expect.objectContaining({
          name: 'TidemarkRangeError',
          code: 'TIDEMARK_ERR_OPTION_INVALID',
          message: `pairwiseInformationBounds: option 'noiseVariance' must be a finite number > 0 (a variance σ²); received ${String(noiseVariance)}.`,
        }),
      );
    }
    expect(() => pairwiseInformationBounds([0, 1, 2], [2, 1], [0, 0])).toThrow(
      expect.objectContaining({ name: 'TidemarkRangeError', code: 'TIDEMARK_ERR_OPTION_INVALID' }),
    );
    expect(() => pairwiseInformationBounds([0, 1], [2, 1], [0, 0, 0])).toThrow(
      expect.objectContaining({ name: 'TidemarkRangeError', code: 'TIDEMARK_ERR_OPTION_INVALID' }),
    );
    expect(() => pairwiseInformationBounds([0, 1], [2, 1], [0, 0], { maxRows: 0 })).toThrow(
      expect.objectContaining({ name: 'TidemarkRangeError', code: 'TIDEMARK_ERR_OPTION_INVALID' }),
    );
    expect(() => pairwiseInformationBounds([0, 1], [2, 1], [0, 0], { noiseVarience: 0.1 } as never)).toThrow(
      expect.objectContaining({
        name: 'TidemarkTypeError',
        code: 'TIDEMARK_ERR_OPTION_UNKNOWN',
        message: expect.stringContaining("Did you mean 'noiseVariance'?") as unknown,
      }),
    );
    expect(() => gaussianMixtureEntropyBounds([0, 1], [2, 1], 1, [1])).toThrow(
      expect.objectContaining({ name: 'TidemarkRangeError', code: 'TIDEMARK_ERR_OPTION_INVALID' }),
    );
  });
});
