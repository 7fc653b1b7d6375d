import { describe, expect, it } from 'vitest';
import { linearProbeInformation } from '../../src/analysis/linear-probe-information.js';
import { gaussian, mulberry32 } from '../helpers/random.js';

// Sources:
//  - D. Barber & F. Agakov (2003), "The IM algorithm: a variational approach to Information Maximization",
//    NIPS 16: I(T;Y) ≥ H(Y) + E[log q(y|t)] for any conditional q [verified: the bound as restated in the
//    TensorFlow Probability documentation of lower_bound_barber_agakov, which cites the paper].
//  - C. M. Bishop (2006), Pattern Recognition and Machine Learning, §4.2 (eqs. 4.65–4.66; equation numbers from
//    memory): two Gaussian classes with a shared covariance have a logistic posterior p(y=1|t) = σ(wᵀt + w0),
//    w = Σ⁻¹(μ1 − μ0). With μ1 = −μ0 = μ, Σ = I and equal priors, w = 2μ and w0 = 0, so a linear read-out can
//    be exact and the bound tight: I(T;Y) = 1 − E[h_b(σ(2‖μ‖·s))] bits, s ~ N(‖μ‖, 1) the projection on μ/‖μ‖
//    (by symmetry the class y = 0 gives the same expectation). The expectation is computed here by Simpson's rule.
//  - Cover & Thomas (2006), Thm 2.6.4: H(Y) = log2 K for K equally likely classes; I(T;Y) = 0 when T and Y are
//    independent (ch. 2).

const hb = (p: number): number => (p <= 0 || p >= 1 ? 0 : -p * Math.log2(p) - (1 - p) * Math.log2(1 - p));
const sigmoid = (z: number): number => 1 / (1 + Math.exp(-z));

/** 1 − E[h_b(σ(2m·s))], s ~ N(m, 1): the exact I(T;Y) of the two-Gaussian case, bits. */
function twoGaussianInformation(m: number): number {
  const lo = m - 12;
  const hi = m + 12;
  const n = 20_000;
  const h = (hi - lo) / n;
  const f = (s: number): number => (Math.exp(-((s - m) ** 2) / 2) / Math.sqrt(2 * Math.PI)) * hb(sigmoid(2 * m * s));
  let acc = f(lo) + f(hi);
  for (let i = 1; i < n; i++) acc += (i % 2 === 1 ? 4 : 2) * f(lo + i * h);
  return 1 - (acc * h) / 3;
}

/** n rows of d units: class y = i mod 2, T = ±μ + N(0, I) with μ = (m/√d)·(1, …, 1). */
function twoGaussians(n: number, d: number, m: number, seed: number): { acts: Float64Array; labels: number[] } {
  const rng = mulberry32(seed);
  const acts = new Float64Array(n * d);
  const labels: number[] = [];
  for (let i = 0; i < n; i++) {
    const y = i % 2;
    labels.push(y);
    for (let j = 0; j < d; j++) acts[i * d + j] = (y === 1 ? 1 : -1) * (m / Math.sqrt(d)) + gaussian(rng);
  }
  return { acts, labels };
}

describe('linearProbeInformation: the Barber–Agakov bound with a cross-fitted softmax regression', () => {
  it('matches the exact I(T;Y) of two Gaussian classes, where a linear read-out is the Bayes posterior', () => {
    for (const [m, d] of [
      [0.5, 1],
      [1, 8],
      [2, 8],
      [1, 32],
    ] as const) {
      const exact = twoGaussianInformation(m);
      const { acts, labels } = twoGaussians(4000, d, m, 11 + d);
      const r = linearProbeInformation(acts, [4000, d], labels, { maxRows: 4000 });
      expect(r.label_entropy).toBeCloseTo(1, 9); // 2,000 of each class
      // Held-out, so the fitted q is a little worse than the posterior: a well-specified maximum-likelihood fit of
      // p parameters on n rows loses about p/(2n) nats of held-out log-loss (Akaike's argument; from memory), here
      // p = d + 1 and n = 2,000 per fold. The held-out mean of 4,000 row losses has a standard error of about
      // 0.015 bits (measured over seeds); three of them bound the draw.
      const overfit = (d + 1) / (2 * 2000) / Math.LN2;
      expect(r.mi_label_lower, `m ${m}, d ${d}: exact ${exact.toFixed(4)}`).toBeLessThan(exact + 0.045);
      expect(r.mi_label_lower, `m ${m}, d ${d}: exact ${exact.toFixed(4)}`).toBeGreaterThan(exact - overfit - 0.045);
      expect(r.rows).toBe(4000);
    }
    // Averaged over 8 draws the sampling error shrinks and the over-fitting cost shows: at d = 32 the mean sits
    // below the exact value by about p/(2n) = 0.012 bits, and not more than 0.02 bits away.
    const exact = twoGaussianInformation(1);
    const draws = Array.from({ length: 8 }, (_, s) => {
      const { acts, labels } = twoGaussians(4000, 32, 1, 100 + s);
      return linearProbeInformation(acts, [4000, 32], labels, { maxRows: 4000 }).mi_label_lower;
    });
    const mean = draws.reduce((a, b) => a + b, 0) / draws.length;
    expect(mean).toBeLessThan(exact);
    expect(mean).toBeGreaterThan(exact - 0.02);
    // The reference itself: m = 0 carries nothing, and the values grow with the separation.
    expect(twoGaussianInformation(0)).toBeCloseTo(0, 9);
    expect(twoGaussianInformation(1)).toBeGreaterThan(twoGaussianInformation(0.5));
  });

  it('reads about 0 when the labels do not depend on the layer (never below 0)', () => {
    const rng = mulberry32(5);
    const n = 1000;
    const d = 16;
    const acts = Float64Array.from({ length: n * d }, () => gaussian(rng));
    const labels = Array.from({ length: n }, (_, i) => i % 4);
    const r = linearProbeInformation(acts, [n, d], labels);
    expect(r.label_entropy).toBeCloseTo(2, 9);
    expect(r.mi_label_lower).toBeGreaterThanOrEqual(0);
    expect(r.mi_label_lower).toBeLessThan(0.02);
    // The held-out cross-entropy is no better than the prior's 2 bits (up to sampling error).
    expect(r.cross_entropy).toBeGreaterThan(1.98);
    expect(r.accuracy).toBeLessThan(0.35);
  });

  it('approaches H(Y) = log2 10 for ten well-separated classes, and is capped by it', () => {
    const rng = mulberry32(9);
    const k = 10;
    const d = 12;
    const n = 1000;
    const centres = Array.from({ length: k }, () => Array.from({ length: d }, () => 6 * gaussian(rng)));
    const acts = new Float64Array(n * d);
    const labels: number[] = [];
    for (let i = 0; i < n; i++) {
      labels.push(i % k);
      for (let j = 0; j < d; j++) acts[i * d + j] = centres[i % k]![j]! + 0.3 * gaussian(rng);
    }
    const r = linearProbeInformation(acts, [n, d], labels);
    expect(r.label_entropy).toBeCloseTo(Math.log2(10), 9);
    expect(r.accuracy).toBe(1);
    expect(r.mi_label_lower).toBeGreaterThan(Math.log2(10) - 0.1);
    expect(r.mi_label_lower).toBeLessThanOrEqual(r.label_entropy);
  });

  it('does not count what a linear read-out cannot reach: XOR classes read near 0, their product near 1 bit', () => {
    // y = [t1 > 0] XOR [t2 > 0]: I(T;Y) = 1 bit, but no linear map of (t1, t2) predicts it; adding the
    // feature t1·t2 makes it linear. The bound is a lower bound, and says so by the gap.
    const rng = mulberry32(3);
    const n = 2000;
    const plain = new Float64Array(n * 2);
    const lifted = new Float64Array(n * 3);
    const labels: number[] = [];
    for (let i = 0; i < n; i++) {
      const a = gaussian(rng);
      const b = gaussian(rng);
      labels.push(a > 0 !== b > 0 ? 1 : 0);
      plain.set([a, b], i * 2);
      lifted.set([a, b, a * b], i * 3);
    }
    expect(linearProbeInformation(plain, [n, 2], labels).mi_label_lower).toBeLessThan(0.02);
    expect(linearProbeInformation(lifted, [n, 3], labels).mi_label_lower).toBeGreaterThan(0.6);
  });

  it('is not thrown off by a unit that is nearly always zero (a ReLU unit alive on a few rows)', () => {
    // Two Gaussian classes in 8 units, and a ninth unit that is 0.01 on ten rows of class 1, 3 on one row of class 0
    // and 0 elsewhere. In the fold that holds the 3 out, the unit barely moves on the fitting rows and predicts class 1;
    // standardised by its own spread the held-out 3 becomes thousands of spreads, an absurd logit for the wrong class,
    // and that one row would pull the bound to nothing. (Seen on MNIST before the fix: 0.76 bits where the
    // neighbouring windows read 2.7.)
    const n = 1000;
    const { acts: base, labels } = twoGaussians(n, 8, 1, 21);
    const acts = new Float64Array(n * 9);
    const ones = labels.flatMap((y, i) => (y === 1 ? [i] : [])).slice(0, 10);
    const spike = labels.indexOf(0);
    for (let i = 0; i < n; i++) {
      acts.set(base.subarray(i * 8, i * 8 + 8), i * 9);
      acts[i * 9 + 8] = ones.includes(i) ? 0.01 : i === spike ? 3 : 0;
    }
    const without = linearProbeInformation(base, [n, 8], labels);
    const withUnit = linearProbeInformation(acts, [n, 9], labels);
    expect(Math.abs(withUnit.mi_label_lower - without.mi_label_lower)).toBeLessThan(0.03);
  });

  it('is seeded, drops non-finite rows, subsamples, and checks its options', () => {
    const { acts, labels } = twoGaussians(600, 4, 1, 2);
    acts[5] = Number.NaN;
    const a = linearProbeInformation(acts, [600, 4], labels, { maxRows: 300, seed: 4 });
    const b = linearProbeInformation(acts, [600, 4], labels, { maxRows: 300, seed: 4 });
    expect(a).toEqual(b);
    expect(a.dropped).toBe(1);
    expect(a.rows).toBe(300);
    expect(a.estimator).toBe('linear-probe-barber-agakov');
    const one = linearProbeInformation(new Float64Array(8), [4, 2], [3, 3, 3, 3]);
    expect(one).toMatchObject({ mi_label_lower: 0, label_entropy: 0, classes: 1 });
    expect(() => linearProbeInformation(acts, [600, 4], labels, { folds: 1 })).toThrow(/folds.*≥ 2/);
    expect(() => linearProbeInformation(acts, [600, 4], labels, { l2: -1 })).toThrow(/l2/);
    expect(() => linearProbeInformation(acts, [600, 4], labels, { fold: 2 } as never)).toThrow(/fold/);
  });
});
