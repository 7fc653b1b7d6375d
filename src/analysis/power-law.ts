/**
 * Power-law fit y = A·x^b by ordinary least squares of ln y on ln x (simple linear regression),
 * with the slope's standard error and a nominal 95% interval. Successive training windows are
 * autocorrelated, so the interval is descriptive, not a test.
 */
import { studentTQuantile } from './student-t.js';

export { studentTQuantile } from './student-t.js';

export interface PowerLawFit {
  /** b, the exponent. */
  slope: number;
  /** a = ln A. */
  intercept: number;
  slopeStdError: number;
  /** s² = SSE/(n − 2). */
  residualVariance: number;
  rSquared: number;
  n: number;
  /** b ± t(0.975, n−2)·SE. */
  ci95: [number, number];
}

/** Straight-line least squares v = intercept + slope·u; the power-law fields plus two the line has anyway. */
export interface LineFit extends PowerLawFit {
  /** s·sqrt(1/n + ū²/S_uu). */
  interceptStdError: number;
  /** s = sqrt(SSE/(n − 2)). */
  residualStdDev: number;
}

/**
 * Ordinary least squares of v on u over the first min(us.length, vs.length) pairs, which must be finite;
 * null when fewer than three (no residual degrees of freedom) or u has no spread.
 */
export function fitLine(us: ArrayLike<number>, vs: ArrayLike<number>): LineFit | null {
  const n = Math.min(us.length, vs.length);
  if (n < 3) return null;
  // Sums of squares about the means (two passes): the one-pass Σu² − nū² cancels when ū is large.
  let ub = 0;
  let vb = 0;
  for (let i = 0; i < n; i++) {
    ub += us[i]!;
    vb += vs[i]!;
  }
  ub /= n;
  vb /= n;
  let suu = 0;
  let suv = 0;
  let svv = 0;
  for (let i = 0; i < n; i++) {
    const du = us[i]! - ub;
    const dv = vs[i]! - vb;
    suu += du * du;
    suv += du * dv;
    svv += dv * dv;
  }
  if (!(suu > 0)) return null;
  const slope = suv / suu;
  const intercept = vb - slope * ub;
  // SSE from the residuals themselves, not S_vv − b·S_uv, which cancels when the fit is close.
  let sse = 0;
  for (let i = 0; i < n; i++) {
    const r = vs[i]! - intercept - slope * us[i]!;
    sse += r * r;
  }
  const df = n - 2;
  const residualVariance = sse / df;
  const se = Math.sqrt(residualVariance / suu);
  const half = studentTQuantile(0.975, df) * se;
  return {
    slope,
    intercept,
    slopeStdError: se,
    interceptStdError: Math.sqrt(residualVariance * (1 / n + (ub * ub) / suu)),
    residualVariance,
    residualStdDev: Math.sqrt(residualVariance),
    rSquared: svv > 0 ? 1 - sse / svv : 1,
    n,
    ci95: [slope - half, slope + half],
  };
}

/**
 * Fits the pairs with x > 0 and y > 0; null when fewer than three remain (no residual degrees of
 * freedom for SE and CI) or x has no spread.
 */
export function fitPowerLaw(xs: ArrayLike<number>, ys: ArrayLike<number>): PowerLawFit | null {
  const len = Math.min(xs.length, ys.length);
  const u: number[] = [];
  const v: number[] = [];
  for (let i = 0; i < len; i++) {
    const x = xs[i]!;
    const y = ys[i]!;
    if (x > 0 && y > 0 && Number.isFinite(x) && Number.isFinite(y)) {
      u.push(Math.log(x));
      v.push(Math.log(y));
    }
  }
  const line = fitLine(u, v);
  if (line === null) return null;
  // Only the power-law fields: reports store this object as it is.
  const { slope, intercept, slopeStdError, residualVariance, rSquared, n, ci95 } = line;
  return { slope, intercept, slopeStdError, residualVariance, rSquared, n, ci95 };
}
