import { describe, expect, it } from 'vitest';
import { addGrams, batchSnrDb, jackknifeSe, noiseFromGram } from '../../src/analysis/fixed-weight-noise.js';
import { gaussian, mulberry32 } from '../helpers/random.js';

/** The Gram matrix g_i·g_j of row vectors. */
function gramOf(vectors: number[][]): Float64Array {
  const k = vectors.length;
  const out = new Float64Array(k * k);
  for (let i = 0; i < k; i++) {
    for (let j = 0; j < k; j++) out[i * k + j] = vectors[i]!.reduce((a, v, c) => a + v * vectors[j]![c]!, 0);
  }
  return out;
}

describe('noiseFromGram', () => {
  it('reproduces methods.md §1.5 row 3: four group gradients (1,2),(3,2),(1,4),(3,4) of 32 rows', () => {
    // McCandlish et al. (2018), "An Empirical Model of Large-Batch Training", B_simple = tr Σ/|G|² with the
    // unbiased |G|² = ‖m‖² − s²/K of methods.md §1.4 [computed]: |G|² = 37/3, tr Σ = 32·8/3, B = 6.9189189189.
    const r = noiseFromGram(gramOf([[1, 2], [3, 2], [1, 4], [3, 4]]), { groups: 4, groupRows: 32, population: null }, 10);
    expect(r.grad_sq).toBeCloseTo(37 / 3, 12);
    expect(r.trace).toBeCloseTo((32 * 8) / 3, 12);
    expect(r.noise_scale).toBeCloseTo(6.9189189189, 9);
    expect(r.resolved).toBe(true);
  });

  it('reproduces methods.md §1.5 row 4: the same vectors as single rows give 8/37', () => {
    // Per-example gradients (B_s = 1, B_b = 4), McCandlish et al. (2018) Appendix A.1 [computed].
    const r = noiseFromGram(gramOf([[1, 2], [3, 2], [1, 4], [3, 4]]), { groups: 4, groupRows: 1, population: null }, 10);
    expect(r.trace).toBeCloseTo(8 / 3, 12);
    expect(r.noise_scale).toBeCloseTo(0.2162162162, 9);
  });

  it('pools layers by the ratio of sums, methods.md §1.5 row 5: 110/25.1 = 4.3824701195', () => {
    // Layer A: tr Σ = 100, |G|² = 25; layer B: tr Σ = 10, |G|² = 0.1 [computed]. One coordinate per layer,
    // three single-row groups a − d, a, a + d: s² = d², |G|² = a² − d²/3.
    const layer = (trace: number, gradSq: number): number[][] => {
      const d = Math.sqrt(trace);
      const a = Math.sqrt(gradSq + trace / 3);
      return [[a - d], [a], [a + d]];
    };
    const design = { groups: 3, groupRows: 1, population: null };
    const a = gramOf(layer(100, 25));
    const b = gramOf(layer(10, 0.1));
    expect(noiseFromGram(a, design, 10).noise_scale).toBeCloseTo(4, 9);
    // Three groups cannot resolve B's tiny |G|² (its leave-one-out values scatter), so read the estimates.
    const eb = noiseFromGram(b, design, 10);
    expect(eb.trace / eb.grad_sq).toBeCloseTo(100, 7);
    expect(noiseFromGram(addGrams([a, b], 3), design, 10).noise_scale).toBeCloseTo(4.3824701195, 9);
  });

  it('averages to |G|² = 25 and tr Σ = 100 over independent draws, methods.md §1.5 row 6', () => {
    // G = (3, 4), per-row covariance 50·I₂ (tr Σ = 100), groups of B = 16, K = 10: the estimators are unbiased,
    // so their averages over 200k draws give B_simple = 4.000 within 1% [computed, Monte Carlo].
    const rng = mulberry32(6);
    const reps = 200_000;
    const k = 10;
    const sd = Math.sqrt(50 / 16);
    let g = 0;
    let t = 0;
    const gram = new Float64Array(k * k);
    const v = Array.from({ length: k }, () => [0, 0]);
    for (let r = 0; r < reps; r++) {
      for (const row of v) {
        row[0] = 3 + sd * gaussian(rng);
        row[1] = 4 + sd * gaussian(rng);
      }
      for (let i = 0; i < k; i++) for (let j = 0; j < k; j++) gram[i * k + j] = v[i]![0]! * v[j]![0]! + v[i]![1]! * v[j]![1]!;
      const est = noiseFromGram(gram, { groups: k, groupRows: 16, population: null }, 10);
      g += est.grad_sq;
      t += est.trace;
    }
    expect(Math.abs(g / reps - 25) / 25).toBeLessThan(0.01);
    expect(Math.abs(t / reps - 100) / 100).toBeLessThan(0.01);
    expect(Math.abs(t / g - 4) / 4).toBeLessThan(0.01);
  });

  it('is unbiased for a finite population drawn without replacement, and exact when every row is drawn', () => {
    // Finite-population correction for sampling without replacement (Cochran, Sampling Techniques, ch. 2,
    // from memory; derived for groups in methods.md §10.1): with N rows, K groups of b, n = K·b,
    // E[b·s²]·(N−1)/N = tr Σ_pop and E[‖m‖² − (1 − n/N)·s²/K] = |G_pop|².
    const rng = mulberry32(11);
    const n = 240;
    const dim = 5;
    const rows = Array.from({ length: n }, () => Array.from({ length: dim }, (_, c) => 0.3 * c + gaussian(rng) * (1 + c)));
    const mean = Array.from({ length: dim }, (_, c) => rows.reduce((a, r) => a + r[c]!, 0) / n);
    const gPop = mean.reduce((a, m) => a + m * m, 0);
    const tracePop = rows.reduce((a, r) => a + r.reduce((s, v, c) => s + (v - mean[c]!) ** 2, 0), 0) / n;
    const groupMeans = (idx: number[], b: number, k: number): number[][] =>
      Array.from({ length: k }, (_, gi) => Array.from({ length: dim }, (_, c) => idx.slice(gi * b, (gi + 1) * b).reduce((a, i) => a + rows[i]![c]!, 0) / b));
    // Every row drawn: |G|² is the population's exactly.
    const all = Array.from({ length: n }, (_, i) => i);
    const full = noiseFromGram(gramOf(groupMeans(all, 20, 12)), { groups: 12, groupRows: 20, population: n }, 10);
    expect(full.grad_sq).toBeCloseTo(gPop, 12);
    // Part of the rows (6 groups of 20 of 240), averaged over many random draws.
    let g = 0;
    let t = 0;
    const reps = 20_000;
    for (let r = 0; r < reps; r++) {
      const idx = all.slice();
      for (let i = 0; i < 120; i++) {
        const j = i + Math.floor(rng() * (n - i));
        [idx[i], idx[j]] = [idx[j]!, idx[i]!];
      }
      const est = noiseFromGram(gramOf(groupMeans(idx, 20, 6)), { groups: 6, groupRows: 20, population: n }, 10);
      g += est.grad_sq;
      t += est.trace;
    }
    expect(Math.abs(t / reps - tracePop) / tracePop).toBeLessThan(0.01);
    // |G|² is small against the noise here (tr Σ/n ≈ 0.3 of it), so allow its Monte Carlo error: ±3 %.
    expect(Math.abs(g / reps - gPop) / gPop).toBeLessThan(0.03);
    // Without the correction the same draws would overstate |G|² by about (n/N)·s²/K: the check can tell.
    expect(gPop * 0.03).toBeLessThan(((120 / 240) * tracePop) / 120);
  });

  it('reports a noise scale missing when |G|² is not resolved from noise', () => {
    // Pure noise: zero-mean groups, |G|² ≈ 0 with a large relative error.
    const rng = mulberry32(3);
    const v = Array.from({ length: 8 }, () => Array.from({ length: 50 }, () => gaussian(rng)));
    const r = noiseFromGram(gramOf(v), { groups: 8, groupRows: 32, population: null });
    expect(r.resolved).toBe(false);
    expect(r.noise_scale).toBeNull();
    expect(r.grad_sq_rse).toBeGreaterThan(0.3);
    // What can still be said: tr Σ / (max(|G|², 0) + 2·SE), a finite lower bound on a noise scale that is
    // infinite here (G = 0).
    expect(Number.isFinite(r.noise_scale_low)).toBe(true);
    expect(r.noise_scale_low).toBeGreaterThan(0);
    expect(r.noise_scale_low).toBeLessThan(r.trace / Math.max(r.grad_sq, 1e-300));
  });

  it('rejects fewer than 3 groups', () => {
    expect(() => noiseFromGram(new Float64Array(4), { groups: 2, groupRows: 1, population: null })).toThrow(RangeError);
  });
});

describe('jackknifeSe', () => {
  it('equals s/√n for the mean (Efron & Tibshirani 1993, An Introduction to the Bootstrap, §11.2; from memory)', () => {
    const x = [4, 7, 13, 16, 2, 9];
    const n = x.length;
    const mean = x.reduce((a, b) => a + b, 0) / n;
    const s = Math.sqrt(x.reduce((a, b) => a + (b - mean) ** 2, 0) / (n - 1));
    const loo = x.map((_, i) => (mean * n - x[i]!) / (n - 1));
    expect(jackknifeSe(loo)).toBeCloseTo(s / Math.sqrt(n), 12);
  });
});

describe('batchSnrDb', () => {
  it('is 10·log10(B/B_simple): methods.md §2, SNR_corr² = 4.625 → 6.651117 dB', () => {
    expect(batchSnrDb(32, 32 / 4.625)).toBeCloseTo(6.651117, 6);
    expect(batchSnrDb(32, 32)).toBe(0);
    expect(batchSnrDb(32, null)).toBeNull();
  });
});
