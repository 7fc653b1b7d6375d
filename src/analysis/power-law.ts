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
  const n = u.length;
  if (n < 3) return null;
  let ub = 0;
  let vb = 0;
  for (let i = 0; i < n; i++) {
    ub += u[i]!;
    vb += v[i]!;
  }
  ub /= n;
  vb /= n;
  let suu = 0;
  let suv = 0;
  let svv = 0;
  for (let i = 0; i < n; i++) {
    const du = u[i]! - ub;
    const dv = v[i]! - vb;
    suu += du * du;
    suv += du * dv;
    svv += dv * dv;
  }
  if (!(suu > 0)) return null;
  const slope = suv / suu;
  const intercept = vb - slope * ub;
  let sse = 0;
  for (let i = 0; i < n; i++) {
    const r = v[i]! - intercept - slope * u[i]!;
    sse += r * r;
  }
  const df = n - 2;
  const residualVariance = df > 0 ? sse / df : Number.NaN;
  const se = df > 0 ? Math.sqrt(residualVariance / suu) : Number.NaN;
  const half = df > 0 ? studentTQuantile(0.975, df) * se : 0;
  return {
    slope,
    intercept,
    slopeStdError: se,
    residualVariance,
    rSquared: svv > 0 ? 1 - sse / svv : 1,
    n,
    ci95: [slope - half, slope + half],
  };
}
