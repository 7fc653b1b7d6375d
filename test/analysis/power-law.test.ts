import { describe, expect, it } from 'vitest';
import { fitPowerLaw, studentTQuantile } from '../../src/analysis/power-law.js';

// Source (methods.md §9): ordinary least squares of ln y on ln x, the standard simple linear regression
// result (Draper & Smith, "Applied Regression Analysis"; Montgomery, Peck & Vining [memory for the book
// references; formulas standard]): b = S_uv/S_uu, s² = SSE/(n−2), SE(b) = sqrt(s²/S_uu),
// 95% CI b ± t(0.975, n−2)·SE. Check values [computed; slope and SE cross-checked with scipy.stats.linregress].

const XS = [1, 2, 4, 8, 16, 32, 64, 128];
const S_UU = 20.179026584564458; // methods.md §9 [computed]

function within(actual: number, expected: number, tol: number): void {
  expect(Math.abs(actual - expected), `${actual} vs ${expected}`).toBeLessThanOrEqual(tol);
}

describe('fitPowerLaw', () => {
  it('recovers exponent 0.5 and prefactor 3 exactly from y = 3·x^0.5 with a zero-width interval (§9 row 1)', () => {
    // methods.md §9 check row 1 [computed]: b = 0.5, A = 3.0, SE = 0 (≈5e-17), CI [0.5, 0.5].
    const fit = fitPowerLaw(XS, XS.map((x) => 3 * Math.sqrt(x)));
    expect(fit).not.toBeNull();
    const f = fit!;
    expect(f.n).toBe(8);
    within(f.slope, 0.5, 1e-12);
    within(Math.exp(f.intercept), 3, 1e-12);
    within(f.slopeStdError, 0, 1e-12);
    within(f.ci95[0], 0.5, 1e-10);
    within(f.ci95[1], 0.5, 1e-10);
    within(f.rSquared, 1, 1e-12);
  });

  it('gives b = 0.49313002361, A = 3.0504189912, SE = 0.01254280345 and CI [0.46243889, 0.52382116] for alternating ±0.05 log noise (§9 row 2)', () => {
    // methods.md §9 check row 2 [computed]: y = 3·x^0.5·exp(ε), ε = (+.05, −.05, +.05, …),
    // s² = 0.0031746032, R² = 0.996133; log10 intercept 0.4843595 = â/ln 10.
    const eps = XS.map((_, i) => (i % 2 === 0 ? 0.05 : -0.05));
    const f = fitPowerLaw(XS, XS.map((x, i) => 3 * Math.sqrt(x) * Math.exp(eps[i]!)))!;
    expect(f).not.toBeNull();
    expect(f.n).toBe(8);
    within(f.slope, 0.49313002361, 1e-10);
    within(Math.exp(f.intercept), 3.0504189912, 1e-9);
    within(f.slopeStdError, 0.01254280345, 1e-10);
    within(f.residualVariance, 0.0031746032, 1e-10);
    within(f.ci95[0], 0.46243889, 1e-8);
    within(f.ci95[1], 0.52382116, 1e-8);
    within(f.rSquared, 0.996133, 1e-6);
    within(f.intercept / Math.LN10, 0.4843595, 1e-7);
    // SE² = s²/S_uu with S_uu = 20.179026584564458 (methods.md §9).
    within(f.residualVariance / f.slopeStdError ** 2, S_UU, 1e-8);
    // Decision rule of methods.md §9: this CI excludes 1 and includes 0.5.
    expect(f.ci95[0] <= 0.5 && 0.5 <= f.ci95[1]).toBe(true);
    expect(f.ci95[1] < 1).toBe(true);
  });

  it('gives b = 1, A = 2, SE = 0.02570509789 and CI [0.93710189, 1.06289811] for symmetric ±0.1 log noise (§9 row 3)', () => {
    // methods.md §9 check row 3 [computed]: y = 2·x·exp(ε), ε = (+.1, −.1, −.1, +.1, +.1, −.1, −.1, +.1),
    // s² = 0.0133333, R² = 0.996051.
    const eps = [0.1, -0.1, -0.1, 0.1, 0.1, -0.1, -0.1, 0.1];
    const f = fitPowerLaw(XS, XS.map((x, i) => 2 * x * Math.exp(eps[i]!)))!;
    expect(f).not.toBeNull();
    within(f.slope, 1, 1e-12);
    within(Math.exp(f.intercept), 2, 1e-12);
    within(f.slopeStdError, 0.02570509789, 1e-10);
    within(f.residualVariance, 0.0133333, 1e-7);
    within(f.ci95[0], 0.93710189, 1e-8);
    within(f.ci95[1], 1.06289811, 1e-8);
    within(f.rSquared, 0.996051, 1e-6);
  });

  it('drops pairs with a non-positive x or y before fitting', () => {
    // methods.md §9 notes: points must be positive, so drop t = 0 and any zero distance.
    const eps = XS.map((_, i) => (i % 2 === 0 ? 0.05 : -0.05));
    const ys = XS.map((x, i) => 3 * Math.sqrt(x) * Math.exp(eps[i]!));
    const f = fitPowerLaw([0, ...XS, 5, -2, 7], [4, ...ys, 0, 9, -1])!;
    expect(f).not.toBeNull();
    expect(f.n).toBe(8);
    within(f.slope, 0.49313002361, 1e-10); // same as §9 row 2
    within(f.slopeStdError, 0.01254280345, 1e-10);
  });

  it('returns null with fewer than three usable points', () => {
    // API contract (fewer than 3 points leaves no residual degrees of freedom for SE and CI, n − 2 = 0).
    expect(fitPowerLaw([], [])).toBeNull();
    expect(fitPowerLaw([1], [1])).toBeNull();
    expect(fitPowerLaw([1, 2], [1, 2])).toBeNull();
    expect(fitPowerLaw([1, 2, 0, 4], [1, 2, 3, 0])).toBeNull(); // only two positive pairs left
    expect(fitPowerLaw([1, 2, 4], [1, 2, 4])).not.toBeNull();
  });

  it('returns null when x has no spread', () => {
    // S_uu = 0 makes b = S_uv/S_uu undefined (methods.md §9).
    expect(fitPowerLaw([5, 5, 5, 5], [1, 2, 3, 4])).toBeNull();
  });
});

describe('studentTQuantile', () => {
  // methods.md §9 t-quantile table [computed with scipy.stats.t.ppf], tolerance 1e-5.
  const TABLE: ReadonlyArray<[df: number, t975: number, t95: number]> = [
    [3, 3.182446, 2.353363],
    [6, 2.446912, 1.94318],
    [8, 2.306004, 1.859548],
    [10, 2.228139, 1.812461],
    [18, 2.100922, 1.734064],
    [28, 2.048407, 1.701131],
    [98, 1.984467, 1.660551],
  ];
  for (const [df, t975, t95] of TABLE) {
    it(`gives t(0.975) = ${t975} and t(0.95) = ${t95} at ${df} degrees of freedom`, () => {
      // methods.md §9 t-quantile table [computed with scipy.stats.t.ppf].
      within(studentTQuantile(0.975, df), t975, 1e-5);
      within(studentTQuantile(0.95, df), t95, 1e-5);
    });
  }

  it('is symmetric about 0 and returns 0 at p = 0.5', () => {
    // Student's t is symmetric: t(1 − p) = −t(p) (standard property).
    expect(studentTQuantile(0.5, 6)).toBe(0);
    within(studentTQuantile(0.025, 6), -2.446912, 1e-5); // methods.md §9 table, df 6
    within(studentTQuantile(0.05, 10), -1.812461, 1e-5); // methods.md §9 table, df 10
  });

  it('matches the closed forms at 1 and 2 degrees of freedom', () => {
    // Closed forms [memory; standard]: t with 1 df is the standard Cauchy, quantile tan(π(p − ½));
    // with 2 df the quantile is (2p − 1)/sqrt(2p(1 − p)).
    for (const p of [0.6, 0.9, 0.975, 0.995]) {
      within(studentTQuantile(p, 1), Math.tan(Math.PI * (p - 0.5)), 1e-6 * Math.tan(Math.PI * (p - 0.5)));
      const t2 = (2 * p - 1) / Math.sqrt(2 * p * (1 - p));
      within(studentTQuantile(p, 2), t2, 1e-8 * t2);
    }
  });
});
