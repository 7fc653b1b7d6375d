import { describe, expect, it } from 'vitest';
import {
  finitePopulationFactor,
  gradientStats,
  poolMoments,
  snrFloor,
  twoBatchNoiseScale,
  type GradientMoments,
} from '../../src/analysis/gradient-stats.js';
import { ShiftedMoments, emptyMoments, welfordPush, type Moments } from '../../src/analysis/moments.js';
import { amplitudeDb } from '../../src/analysis/decibel.js';
import { gaussian, mulberry32, shuffleInPlace } from '../helpers/random.js';

// Sources (methods.md §1):
//  - S. McCandlish, J. Kaplan, D. Amodei et al. (2018), "An Empirical Model of Large-Batch Training",
//    arXiv:1812.06162: B_simple = tr(Σ)/|G|² (§2), two-batch unbiased estimators (Appendix A.1).
//  - methods.md §1.4 derivation: E||m||² = |G|² + tr(Σ)/(B·K), E||s||² = tr(Σ)/B, so
//    |G|²_est = ||m||² − ||s||²/K; pure noise reads SNR ≈ 1/sqrt(K).
//  - W. G. Cochran, "Sampling Techniques", finite population correction (1 − n/N) [memory], used in
//    methods.md §1.4 for windows drawn without replacement from an epoch of M minibatches.

function accumulate(vectors: ReadonlyArray<ArrayLike<number>>): GradientMoments {
  const first = vectors[0];
  if (first === undefined) throw new Error('no vectors');
  const acc = new ShiftedMoments(first.length);
  for (const v of vectors) acc.push(v);
  return { batches: acc.count, meanSquaredNorm: acc.meanSquaredNorm(), varianceTrace: acc.varianceTrace() };
}

function relErr(actual: number, expected: number): number {
  return Math.abs(actual - expected) / Math.abs(expected);
}

/** Mean and standard error of the mean from a Welford accumulator. */
function meanAndSe(m: Moments): { mean: number; se: number } {
  return { mean: m.mean, se: Math.sqrt(m.m2 / (m.n - 1) / m.n) };
}

describe('gradientStats', () => {
  const ROW3 = [
    [1, 2],
    [3, 2],
    [1, 4],
    [3, 4],
  ];

  it('reproduces methods.md §1.5 row 3 from four minibatch gradients at B = 32', () => {
    // methods.md §1.5 check row 3 [computed], tolerance 1e-9:
    // m = (2,3), ||m||² = 13, ||s||² = 8/3 (ddof 1), SNR_raw = 2.2079402166 = 6.879746 dB,
    // |G|²_est = 37/3, SNR_corr² = 4.625, B_simple = 32/4.625 = 6.9189189189 (i.i.d. correction, M unknown).
    const acc = new ShiftedMoments(2);
    for (const g of ROW3) acc.push(new Float32Array(g));
    expect(Array.from(acc.mean())).toEqual([2, 3]);
    const m: GradientMoments = {
      batches: acc.count,
      meanSquaredNorm: acc.meanSquaredNorm(),
      varianceTrace: acc.varianceTrace(),
    };
    expect(m.batches).toBe(4);
    expect(m.meanSquaredNorm).toBeCloseTo(13, 12);
    expect(m.varianceTrace).toBeCloseTo(8 / 3, 12);

    const s = gradientStats(m, { batchSize: 32 });
    expect(s.grad_mean_norm).toBeCloseTo(Math.sqrt(13), 12);
    expect(s.grad_std_norm).toBeCloseTo(Math.sqrt(8 / 3), 12);
    expect(Math.abs(s.grad_snr - 2.2079402166)).toBeLessThan(1e-9);
    expect(s.grad_snr_db).toBeCloseTo(6.879746, 6);
    expect(Math.abs(s.signal_sq - 37 / 3)).toBeLessThan(1e-9);
    // SNR_corr = sqrt(|G|²_est / ||s||²) = 2.1505813168 (row 3).
    expect(Math.abs(Math.sqrt(s.signal_sq / m.varianceTrace) - 2.1505813168)).toBeLessThan(1e-9);
    expect(s.noise_scale).not.toBeNull();
    expect(Math.abs(s.noise_scale! - 6.9189189189)).toBeLessThan(1e-9);
    // Same without an explicit batchesPerEpoch: i.i.d. correction (f = 1).
    expect(gradientStats(m, { batchSize: 32, batchesPerEpoch: null }).noise_scale).toBeCloseTo(6.9189189189, 9);
  });

  it('uses the full-batch gradient uncorrected when the window is a whole epoch (K = M)', () => {
    // methods.md §1.4 "Sampling without replacement": with K = M the 1/K term vanishes (factor 1 − K/M = 0).
    const m = accumulate(ROW3);
    const s = gradientStats(m, { batchSize: 32, batchesPerEpoch: 4 });
    expect(s.signal_sq).toBeCloseTo(13, 12);
    expect(s.noise_scale!).toBeCloseTo((32 * (8 / 3)) / 13, 10);
    // Half an epoch: f = 1 − 4/8 = 0.5 → |G|²_est = 13 − 0.5·(8/3)/4 = 38/3.
    expect(gradientStats(m, { batchSize: 32, batchesPerEpoch: 8 }).signal_sq).toBeCloseTo(38 / 3, 12);
  });

  it('reports no noise scale when the batch size is unknown', () => {
    // design.md: noise_scale needs B; methods.md §1.4 B_simple = B·||s||²/|G|²_est.
    const m = accumulate(ROW3);
    expect(gradientStats(m).noise_scale).toBeNull();
    expect(gradientStats(m, { batchSize: null }).noise_scale).toBeNull();
    // The other fields do not depend on B.
    expect(gradientStats(m).grad_snr).toBeCloseTo(2.2079402166, 9);
  });

  it('reports no noise scale when the bias-corrected signal is not positive', () => {
    // methods.md §1.3: |G|²_est can come out ≤ 0; report missing, never divide by it.
    // (1,0), (−1,0), (1,0), (−1,0): m = 0, ||s||² = 4/3 → |G|²_est = −1/3.
    const m = accumulate([
      [1, 0],
      [-1, 0],
      [1, 0],
      [-1, 0],
    ]);
    const s = gradientStats(m, { batchSize: 16 });
    expect(s.signal_sq).toBeCloseTo(-1 / 3, 12);
    expect(s.noise_scale).toBeNull();
    expect(s.grad_snr).toBe(0);
    expect(s.grad_snr_db).toBe(-Infinity); // methods.md §2: ratio 0 → −Infinity
  });

  it('estimates E||m||² = 25.625, E||s||² = 6.25 and B_simple = 4 from averaged estimators (Monte Carlo, §1.5 row 6)', () => {
    // methods.md §1.5 check row 6 [computed]: G = (3,4), per-example tr Σ = 100 (Σ = 50·I), B = 16, K = 10;
    // expected E||m||² = 25 + 100/(16·10) = 25.625, E||s||² = 100/16 = 6.25, B_simple = 4 within 1%.
    // Minibatch gradients are drawn directly as N(G, Σ/B). With 40 000 reps the standard errors are
    // about 0.028 (0.11%) for ||m||² and 0.010 (0.17%) for ||s||², so 1% is > 5 standard errors; we
    // also require each mean within 4 of its own empirical standard errors.
    const rng = mulberry32(0);
    const reps = 40_000;
    const K = 10;
    const B = 16;
    const sd = Math.sqrt(50 / B);
    const msn = emptyMoments();
    const vt = emptyMoments();
    const acc = new ShiftedMoments(2);
    const g = new Float64Array(2);
    for (let r = 0; r < reps; r++) {
      acc.reset();
      for (let k = 0; k < K; k++) {
        g[0] = 3 + sd * gaussian(rng);
        g[1] = 4 + sd * gaussian(rng);
        acc.push(g);
      }
      welfordPush(msn, acc.meanSquaredNorm());
      welfordPush(vt, acc.varianceTrace());
    }
    const a = meanAndSe(msn);
    const b = meanAndSe(vt);
    expect(Math.abs(a.mean - 25.625)).toBeLessThan(4 * a.se);
    expect(Math.abs(b.mean - 6.25)).toBeLessThan(4 * b.se);
    expect(relErr(a.mean, 25.625)).toBeLessThan(0.01);
    expect(relErr(b.mean, 6.25)).toBeLessThan(0.01);
    const s = gradientStats({ batches: K, meanSquaredNorm: a.mean, varianceTrace: b.mean }, { batchSize: B });
    expect(relErr(s.signal_sq, 25)).toBeLessThan(0.01);
    expect(relErr(s.noise_scale!, 4)).toBeLessThan(0.01);
  });

  it('gives a noise scale within 5% of tr(Σ)/|G|² on synthetic non-Gaussian gradients averaged over many windows', () => {
    // McCandlish et al. (2018) §2: B_simple = tr(Σ)/|G|²; methods.md §1.3 "EMA each, then divide":
    // average numerator and denominator over windows, then take the ratio.
    // Known truth: |G|² = 1, Σ = diag(1..8)·50/36 so tr Σ = 50 and B_simple = 50.
    // Per-example noise is uniform (unit variance, non-Gaussian); a minibatch gradient is the mean of B examples.
    // Standard error of the ratio is about 0.7% with 1500 windows, so 5% is several standard errors.
    const G = [0.6, -0.3, 0.2, 0.5, -0.1, 0.4, 0, -0.3];
    const d = G.length;
    const varDiag = Array.from({ length: d }, (_, j) => ((j + 1) * 50) / 36);
    const trSigma = varDiag.reduce((x, y) => x + y, 0);
    const gSq = G.reduce((x, y) => x + y * y, 0);
    expect(trSigma).toBeCloseTo(50, 12);
    expect(gSq).toBeCloseTo(1, 12);
    const halfWidth = varDiag.map((v) => Math.sqrt(3 * v)); // uniform(−a, a) has variance a²/3
    const rng = mulberry32(2018);
    const B = 16;
    const K = 20;
    const windows = 1500;
    const acc = new ShiftedMoments(d);
    const g = new Float64Array(d);
    let sumMsn = 0;
    let sumVt = 0;
    for (let w = 0; w < windows; w++) {
      acc.reset();
      for (let k = 0; k < K; k++) {
        g.fill(0);
        for (let i = 0; i < B; i++) {
          for (let j = 0; j < d; j++) g[j] = g[j]! + G[j]! + halfWidth[j]! * (2 * rng() - 1);
        }
        for (let j = 0; j < d; j++) g[j] = g[j]! / B;
        acc.push(g);
      }
      sumMsn += acc.meanSquaredNorm();
      sumVt += acc.varianceTrace();
    }
    const s = gradientStats(
      { batches: K, meanSquaredNorm: sumMsn / windows, varianceTrace: sumVt / windows },
      { batchSize: B },
    );
    expect(relErr(s.signal_sq, gSq)).toBeLessThan(0.05);
    expect(relErr(s.noise_scale!, trSigma / gSq)).toBeLessThan(0.05);
    // Without the bias correction (|G|² taken as ||m||²) the estimate is visibly low:
    // E||m||² = 1 + 50/(16·20) = 1.156, so B·||s||²/||m||² ≈ 43 — outside the 5% band.
    const uncorrected = (B * (sumVt / windows)) / (sumMsn / windows);
    expect(relErr(uncorrected, trSigma / gSq)).toBeGreaterThan(0.1);
  });

  it('reads a median SNR of about 0.10 on pure noise with K = 100 (§1.5 row 7)', () => {
    // methods.md §1.4 noise floor and §1.5 check row 7 [computed: Monte Carlo median 0.0994, K = 100, d = 50],
    // tolerance 5%. The median's standard error with 801 reps is about 0.4%.
    const rng = mulberry32(100);
    const K = 100;
    const d = 50;
    const reps = 801;
    const acc = new ShiftedMoments(d);
    const g = new Float64Array(d);
    const snrs: number[] = [];
    for (let r = 0; r < reps; r++) {
      acc.reset();
      for (let k = 0; k < K; k++) {
        for (let j = 0; j < d; j++) g[j] = gaussian(rng);
        acc.push(g);
      }
      snrs.push(
        gradientStats({ batches: K, meanSquaredNorm: acc.meanSquaredNorm(), varianceTrace: acc.varianceTrace() })
          .grad_snr,
      );
    }
    snrs.sort((x, y) => x - y);
    const median = snrs[(reps - 1) / 2]!;
    expect(relErr(median, 0.1)).toBeLessThan(0.05);
    expect(relErr(median, snrFloor(K))).toBeLessThan(0.05);
  });
});

describe('snrFloor and finitePopulationFactor', () => {
  it('give 1/sqrt(K) for independent minibatches', () => {
    // methods.md §1.4 consequence 1: pure noise gives SNR_raw ≈ 1/sqrt(K); K = 100 → 0.1 (−20 dB).
    expect(snrFloor(100)).toBeCloseTo(0.1, 15);
    expect(snrFloor(4)).toBe(0.5);
    expect(snrFloor(7, null)).toBeCloseTo(1 / Math.sqrt(7), 15);
    expect(amplitudeDb(snrFloor(100))).toBeCloseTo(-20, 12);
    // methods.md §1.4 measured note: the i.i.d. floor for K = 63 is about −18 dB.
    expect(amplitudeDb(snrFloor(63))).toBeCloseTo(-18, 0);
    expect(finitePopulationFactor(10)).toBe(1);
    expect(finitePopulationFactor(10, null)).toBe(1);
  });

  it('give sqrt((1 − K/M)/K) for a window drawn without replacement from an epoch of M', () => {
    // methods.md §1.4 "Sampling without replacement" (Cochran finite population correction [memory]).
    expect(finitePopulationFactor(25, 100)).toBeCloseTo(0.75, 15);
    expect(snrFloor(25, 100)).toBeCloseTo(Math.sqrt(0.75 / 25), 15);
    expect(snrFloor(10, 40)).toBeCloseTo(Math.sqrt(0.75 / 10), 15);
  });

  it('give 0 when the window covers the whole epoch (K = M) or more', () => {
    // methods.md §1.4: for K = M the mean is the full-batch gradient and the floor vanishes;
    // the factor is max(0, 1 − K/M).
    expect(finitePopulationFactor(63, 63)).toBe(0);
    expect(snrFloor(63, 63)).toBe(0);
    expect(finitePopulationFactor(70, 63)).toBe(0);
    expect(snrFloor(70, 63)).toBe(0);
  });
});

describe('gradientStats on windows that partition a finite data set', () => {
  // A fixed data set of N = M·B per-example gradients with population mean G (the full-batch gradient),
  // shuffled each epoch into M minibatches. methods.md §1.4: E||m||² = |G|² + (tr Σ/(B·K))·(1 − K/M).
  const d = 4;
  const M = 20;
  const B = 8;
  const N = M * B;
  const rng = mulberry32(1977);
  // ||G0||² = 1 and per-coordinate noise variance 10, so tr Σ/(B·K) = 1 at K = 5: the bias is as big as the signal.
  const examples = Array.from({ length: N }, () => Array.from({ length: d }, () => 0.5 + Math.sqrt(10) * gaussian(rng)));
  const G = Array.from({ length: d }, (_, j) => examples.reduce((acc, e) => acc + e[j]!, 0) / N);
  const gSq = G.reduce((acc, x) => acc + x * x, 0);

  function epochMinibatches(order: number[]): Float64Array[] {
    const out: Float64Array[] = [];
    for (let k = 0; k < M; k++) {
      const g = new Float64Array(d);
      for (let i = 0; i < B; i++) {
        const e = examples[order[k * B + i]!]!;
        for (let j = 0; j < d; j++) g[j] = g[j]! + e[j]!;
      }
      for (let j = 0; j < d; j++) g[j] = g[j]! / B;
      out.push(g);
    }
    return out;
  }

  it('gives signal_sq equal to the full-batch |G|² when the window is one whole epoch', () => {
    // methods.md §1.4: with K = M the window mean is the full-batch gradient; f = 1 − K/M = 0.
    const order = Array.from({ length: N }, (_, i) => i);
    for (let epoch = 0; epoch < 5; epoch++) {
      shuffleInPlace(order, rng);
      const m = accumulate(epochMinibatches(order));
      expect(m.batches).toBe(M);
      const s = gradientStats(m, { batchSize: B, batchesPerEpoch: M });
      expect(relErr(s.signal_sq, gSq)).toBeLessThan(1e-12);
      expect(relErr(s.grad_mean_norm, Math.sqrt(gSq))).toBeLessThan(1e-12);
      // The i.i.d. correction would wrongly subtract ||s||²/K from the exact full-batch norm.
      expect(gradientStats(m, { batchSize: B }).signal_sq).toBeLessThan(gSq * 0.95);
    }
  });

  it('averages the bias-corrected signal_sq to |G|² within a few % for K < M windows over many shuffles', () => {
    // methods.md §1.4 finite-population form: |G|²_est = ||m||² − (1 − K/M)·||s||²/K is unbiased for the
    // data set's |G|² (sampling K of M minibatches without replacement; Cochran FPC [memory]).
    // With K = 5, M = 20 the i.i.d. correction subtracts 1/(1 − K/M) = 4/3 times too much, a bias of
    // about −25% here; the standard error of the 20 000-shuffle average is under 1%.
    const K = 5;
    const order = Array.from({ length: N }, (_, i) => i);
    const corrected = emptyMoments();
    const iid = emptyMoments();
    for (let r = 0; r < 20_000; r++) {
      shuffleInPlace(order, rng);
      const m = accumulate(epochMinibatches(order).slice(0, K));
      welfordPush(corrected, gradientStats(m, { batchSize: B, batchesPerEpoch: M }).signal_sq);
      welfordPush(iid, gradientStats(m, { batchSize: B }).signal_sq);
    }
    const c = meanAndSe(corrected);
    const i = meanAndSe(iid);
    expect(relErr(c.mean, gSq)).toBeLessThan(0.03);
    expect(Math.abs(c.mean - gSq)).toBeLessThan(4 * c.se);
    // The independent-draw correction is measurably biased low on the same windows.
    expect(gSq - i.mean).toBeGreaterThan(10 * i.se);
  });
});

describe('gradientStats on windows that span two shuffled passes', () => {
  // A window with k_p of its K minibatches in pass p: each pass is a draw without replacement and the
  // passes are independent, so f = Σ_p k_p(1 − k_p/M)/K (Cochran's finite population correction applied
  // per pass [memory]; derivation as in methods.md §1.4).
  const d = 4;
  const M = 10;
  const B = 16;
  const N = M * B;
  const rng = mulberry32(4242);
  const examples = Array.from({ length: N }, () => Array.from({ length: d }, () => 0.5 + Math.sqrt(10) * gaussian(rng)));
  const G = Array.from({ length: d }, (_, j) => examples.reduce((acc, e) => acc + e[j]!, 0) / N);
  const gSq = G.reduce((acc, x) => acc + x * x, 0);
  const minibatch = (order: number[], k: number) => {
    const g = new Float64Array(d);
    for (let i = 0; i < B; i++) for (let j = 0; j < d; j++) g[j] = g[j]! + examples[order[k * B + i]!]![j]! / B;
    return g;
  };

  it('has the factor Σ k_p(1 − k_p/M)/K', () => {
    expect(finitePopulationFactor(8, 10, [6, 2])).toBeCloseTo((6 * 0.4 + 2 * 0.8) / 8, 15);
    expect(finitePopulationFactor(8, 10, [8])).toBeCloseTo(0.2, 15);
    expect(snrFloor(8, 10, [6, 2])).toBeCloseTo(Math.sqrt(0.5 / 8), 15);
  });

  it('averages the corrected signal_sq to |G|² where the one-pass factor is biased', () => {
    const order1 = Array.from({ length: N }, (_, i) => i);
    const order2 = order1.slice();
    const split = emptyMoments();
    const onePass = emptyMoments();
    for (let r = 0; r < 20_000; r++) {
      shuffleInPlace(order1, rng);
      shuffleInPlace(order2, rng);
      // The last 6 minibatches of one pass and the first 2 of the next.
      const grads = [4, 5, 6, 7, 8, 9].map((k) => minibatch(order1, k)).concat([0, 1].map((k) => minibatch(order2, k)));
      const m = accumulate(grads);
      welfordPush(split, gradientStats(m, { batchSize: B, batchesPerEpoch: M, passBatches: [6, 2] }).signal_sq);
      welfordPush(onePass, gradientStats(m, { batchSize: B, batchesPerEpoch: M }).signal_sq);
    }
    const a = meanAndSe(split);
    const b = meanAndSe(onePass);
    // The formula drops O(1/N) terms (N = 160 examples), hence a relative tolerance as in the test above.
    expect(relErr(a.mean, gSq)).toBeLessThan(0.03);
    expect(b.mean - gSq).toBeGreaterThan(10 * b.se);
    expect(b.mean - gSq).toBeGreaterThan(3 * Math.abs(a.mean - gSq));
  });
});

describe('poolMoments', () => {
  it('pools layers as a ratio of sums: per-layer 4 and 100, whole model 110/25.1 (§1.5 row 5)', () => {
    // methods.md §1.5 check row 5 [computed], tolerance 1e-9: layer A S = 100, |G|² = 25; layer B S = 10,
    // |G|² = 0.1. With B = 10 and K = 4: S = B·varianceTrace and |G|² = meanSquaredNorm − varianceTrace/K.
    const B = 10;
    const K = 4;
    const layerA: GradientMoments = { batches: K, varianceTrace: 100 / B, meanSquaredNorm: 25 + 100 / B / K };
    const layerB: GradientMoments = { batches: K, varianceTrace: 10 / B, meanSquaredNorm: 0.1 + 10 / B / K };
    const a = gradientStats(layerA, { batchSize: B });
    const b = gradientStats(layerB, { batchSize: B });
    expect(Math.abs(a.signal_sq - 25)).toBeLessThan(1e-9);
    expect(Math.abs(b.signal_sq - 0.1)).toBeLessThan(1e-9);
    expect(Math.abs(a.noise_scale! - 4)).toBeLessThan(1e-9);
    expect(Math.abs(b.noise_scale! - 100)).toBeLessThan(1e-9);
    const pooled = poolMoments([layerA, layerB]);
    expect(pooled.batches).toBe(K);
    expect(pooled.varianceTrace).toBeCloseTo(11, 12);
    const whole = gradientStats(pooled, { batchSize: B });
    expect(Math.abs(whole.signal_sq - 25.1)).toBeLessThan(1e-9);
    expect(Math.abs(whole.noise_scale! - 4.3824701195)).toBeLessThan(1e-9);
    // Not the mean of the per-layer ratios (52).
    expect(Math.abs(whole.noise_scale! - 52)).toBeGreaterThan(40);
  });
});

describe('twoBatchNoiseScale', () => {
  it('recovers |G|² = 25, S = 100, B_simple = 4 from exact expected norms (§1.5 row 1)', () => {
    // methods.md §1.5 row 1 [computed], tol 1e-12; McCandlish et al. (2018) App. A.1 estimators.
    // G = (3,4), Σ = 50·I: N_s = 25 + 100/1 = 125, N_b = 25 + 100/16 = 31.25.
    const r = twoBatchNoiseScale(1, 16, 125, 31.25);
    expect(Math.abs(r.gradSq - 25)).toBeLessThan(1e-12);
    expect(Math.abs(r.trace - 100)).toBeLessThan(1e-12);
    expect(Math.abs(r.noiseScale - 4)).toBeLessThan(1e-12);
  });

  it('gives |G|² = 2/7, S = 384/7, B_simple = 192 for B_s = 32, B_b = 256, N_s = 2, N_b = 0.5 (§1.5 row 2)', () => {
    // methods.md §1.5 row 2 [computed], tol 1e-9; McCandlish et al. (2018) App. A.1.
    const r = twoBatchNoiseScale(32, 256, 2.0, 0.5);
    expect(Math.abs(r.gradSq - 0.285714285714)).toBeLessThan(1e-9);
    expect(Math.abs(r.trace - 54.857142857)).toBeLessThan(1e-9);
    expect(Math.abs(r.noiseScale - 192)).toBeLessThan(1e-9);
  });

  it('matches the K-minibatch estimator of row 3 when the four vectors are per-example gradients (§1.5 row 4)', () => {
    // methods.md §1.5 row 4 [computed], tol 1e-9: B_s = 1 with N_s = mean per-example ||g||² = 15,
    // B_b = 4 with N_b = ||mean||² = 13 → S = 8/3, |G|² = 37/3, B_simple = 8/37; ×32 gives row 3's 6.9189189189.
    const r = twoBatchNoiseScale(1, 4, 15, 13);
    expect(Math.abs(r.trace - 8 / 3)).toBeLessThan(1e-9);
    expect(Math.abs(r.gradSq - 37 / 3)).toBeLessThan(1e-9);
    expect(Math.abs(r.noiseScale - 0.2162162162)).toBeLessThan(1e-9);
    expect(Math.abs(32 * r.noiseScale - 6.9189189189)).toBeLessThan(1e-9);
  });
});
