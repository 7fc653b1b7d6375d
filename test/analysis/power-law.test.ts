import { describe, expect, it } from 'vitest';
import { fitLine, fitPowerLaw, studentTQuantile } from '../../src/analysis/power-law.js';

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

// NIST Information Technology Laboratory, Statistical Reference Datasets (StRD), Linear Least Squares
// Regression, dataset "Norris" (Norris, J., NIST, "Calibration of Ozone Monitors"; lower difficulty; model
// y = B0 + B1·x + e; certified values quoted to 15 significant digits), itl.nist.gov/div898/strd/lls/data/Norris.shtml.
// Data (36 rows of y, x) and certified values read from the NIST file text as vendored in:
//   apache/commons-math src/test/java/org/apache/commons/math3/stat/regression/SimpleRegressionTest.java
//     (commit 0ee817712b9e8330fdfd6985752aa8f1b25ba9d9): data; B0, B1, SD(B0), SD(B1), R², residual mean square, SSE;
//   BrianGladman/gsl fit/test.c (commit 03845d3b1a5c9f36c48fc2d6589665342e8a2773): data; B0, B1, SD(B0), SD(B1), SSE;
//   a full copy of Norris.dat with its header (certified "Residual Standard Deviation" included) held in the code
//     search index (file id 6625630082; the index did not report its repository).
// The three copies of the data were compared value by value and agree.
const NORRIS_Y = [
  0.1, 338.8, 118.1, 888.0, 9.2, 228.1, 668.5, 998.5, 449.1, 778.9, 559.2, 0.3, 0.1, 778.1, 668.8, 339.3, 448.9, 10.8,
  557.7, 228.3, 998.0, 888.8, 119.6, 0.3, 0.6, 557.6, 339.3, 888.0, 998.5, 778.9, 10.2, 117.6, 228.9, 668.4, 449.2, 0.2,
];
const NORRIS_X = [
  0.2, 337.4, 118.2, 884.6, 10.1, 226.5, 666.3, 996.3, 448.6, 777.0, 558.2, 0.4, 0.6, 775.5, 666.9, 338.0, 447.5, 11.6,
  556.0, 228.1, 995.8, 887.6, 120.2, 0.3, 0.3, 556.8, 339.1, 887.2, 999.0, 779.0, 11.1, 118.3, 229.2, 669.1, 448.9, 0.5,
];
const B0 = -0.262323073774029; // NIST certified
const B1 = 1.00211681802045; // NIST certified
const SD_B0 = 0.232818234301152; // NIST certified
const SD_B1 = 0.429796848199937e-3; // NIST certified
const RESIDUAL_SD = 0.884796396144373; // NIST certified
const R_SQUARED = 0.999993745883712; // NIST certified
const RESIDUAL_MEAN_SQUARE = 0.782864662630069; // NIST certified analysis of variance table, residual row (34 df)
// t(0.975, 34) [computed with scipy.stats.t.ppf(0.975, 34), SciPy 1.17.1 from PyPI; mpmath 1.3.0, inverting the
// regularized incomplete beta at 40 digits, gives 2.032244509317718964]. Printed tables give 2.032 at 34 df.
const T_975_34 = 2.0322445093177186;
// Relative tolerance for every certified check: NIST certifies ~15 digits; we ask for 9.
const REL = 1e-9;

function relWithin(actual: number, expected: number, tol: number): void {
  expect(Math.abs(actual - expected) / Math.abs(expected), `${actual} vs ${expected}`).toBeLessThanOrEqual(tol);
}

describe('fitLine on the NIST StRD Norris data', () => {
  it('matches the certified B1, B0, SD(B1), SD(B0), residual SD and R² to 1e-9 relative', () => {
    // NIST StRD "Norris" certified regression statistics (source above).
    const f = fitLine(NORRIS_X, NORRIS_Y);
    expect(f).not.toBeNull();
    expect(f!.n).toBe(36);
    relWithin(f!.slope, B1, REL);
    relWithin(f!.intercept, B0, REL);
    relWithin(f!.slopeStdError, SD_B1, REL);
    relWithin(f!.interceptStdError, SD_B0, REL);
    relWithin(f!.residualStdDev, RESIDUAL_SD, REL);
    relWithin(f!.residualVariance, RESIDUAL_MEAN_SQUARE, REL);
    // R² is 1 − 6.3e-6: a relative tolerance on R² itself would pass a wrong fifth decimal, so check 1 − R².
    relWithin(1 - f!.rSquared, 1 - R_SQUARED, REL);
  });

  it('gives the 95 % interval B1 ± t(0.975, 34)·SD(B1) from the certified values', () => {
    // Interval from NIST StRD "Norris" certified B1 and SD(B1) with t(0.975, 34) from SciPy (above); the
    // half-width, 8.7e-4, is checked on its own so the tolerance is not lost in the endpoints' size.
    relWithin(studentTQuantile(0.975, 34), T_975_34, REL);
    const f = fitLine(NORRIS_X, NORRIS_Y)!;
    const half = T_975_34 * SD_B1;
    relWithin((f.ci95[1] - f.ci95[0]) / 2, half, REL);
    relWithin((f.ci95[0] + f.ci95[1]) / 2, B1, REL);
    relWithin(f.ci95[0], B1 - half, REL);
    relWithin(f.ci95[1], B1 + half, REL);
  });

  it('fitPowerLaw on exp(x − 500), exp(y − 500) is the certified regression of y on x', () => {
    // The log-log fit of exponentiated Norris data is the NIST StRD "Norris" regression (source above). exp(999)
    // overflows, so both variables are shifted by 500 first: the slope, its SD, s² and R² do not move, and the
    // intercept becomes B0 + 500·(B1 − 1) (shift both sides of y = B0 + B1·x by 500).
    const u = NORRIS_X.map((x) => x - 500);
    const v = NORRIS_Y.map((y) => y - 500);
    const p = fitPowerLaw(u.map(Math.exp), v.map(Math.exp));
    const l = fitLine(u, v)!;
    expect(p).not.toBeNull();
    expect(p!.n).toBe(36);
    relWithin(p!.slope, B1, REL);
    relWithin(p!.slopeStdError, SD_B1, REL);
    relWithin(p!.residualVariance, RESIDUAL_MEAN_SQUARE, REL);
    relWithin(1 - p!.rSquared, 1 - R_SQUARED, REL);
    relWithin(p!.intercept, B0 + 500 * (B1 - 1), REL);
    // And field by field it is fitLine on the logs, which are u and v up to rounding in exp and log.
    for (const k of ['slope', 'intercept', 'slopeStdError', 'residualVariance', 'rSquared'] as const) {
      relWithin(p![k], l[k], 1e-12);
    }
    relWithin(p!.ci95[0], l.ci95[0], 1e-12);
    relWithin(p!.ci95[1], l.ci95[1], 1e-12);
  });

  it('returns null with fewer than three pairs or no spread in u', () => {
    // API contract, as fitPowerLaw (n − 2 = 0 leaves no residual degrees of freedom; S_uu = 0 leaves b undefined).
    expect(fitLine([0.2, 337.4], [0.1, 338.8])).toBeNull();
    expect(fitLine([3, 3, 3], [1, 2, 4])).toBeNull();
    expect(fitLine(NORRIS_X.slice(0, 3), NORRIS_Y.slice(0, 3))).not.toBeNull();
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
