/**
 * Many runs of one question side by side (issue 15): each run's series put on one grid of steps by
 * interpolation on log step, the spread across runs at each grid step (median, quartiles, min–max), and
 * percentile-bootstrap intervals for a median and for a power-law exponent over runs.
 *
 * Quantiles are Hyndman & Fan (1996, "Sample Quantiles in Statistical Packages", definition 7: linear
 * interpolation between order statistics at h = (n − 1)p), the definition most statistics software uses by
 * default. Intervals are percentile bootstraps (Efron & Tibshirani 1993, "An Introduction to the Bootstrap",
 * ch. 13) with a seeded generator, so the same runs give the same interval.
 */
import { fitPowerLaw } from './power-law.js';
import { mulberry32 } from './random.js';

export interface SeriesPointLike {
  step: number;
  value: number;
}

/**
 * `points` values spread evenly on a log scale from `first` to `last` (both > 0, both included): training
 * dynamics run on a log time scale, so a linear grid would spend almost every point on the late windows.
 */
export function logGrid(first: number, last: number, points: number): number[] {
  if (!(first > 0) || !(last >= first) || !Number.isFinite(last) || !Number.isInteger(points) || points < 1) return [];
  if (points === 1 || last === first) return [first];
  const a = Math.log(first);
  const b = Math.log(last);
  return Array.from({ length: points }, (_, k) => (k === 0 ? first : k === points - 1 ? last : Math.exp(a + ((b - a) * k) / (points - 1))));
}

/** {@link logGrid} rounded to whole steps, without repeats. */
export function logStepGrid(first: number, last: number, points: number): number[] {
  const out: number[] = [];
  for (const v of logGrid(first, last, points)) {
    const s = Math.round(v);
    if (out.length === 0 || s > out[out.length - 1]!) out.push(s);
  }
  return out;
}

/**
 * The series' values at each grid step, interpolated linearly in log step between the two points around it
 * (a point at the grid step itself is taken as it is). NaN outside the series' first–last step (no
 * extrapolation: a run that ended early says nothing about later steps) and where a neighbour is not finite.
 * Points must be in increasing step order with steps > 0.
 */
export function valuesOnLogSteps(series: readonly SeriesPointLike[], grid: readonly number[]): number[] {
  const out = new Array<number>(grid.length).fill(Number.NaN);
  if (series.length === 0) return out;
  let j = 0;
  for (let g = 0; g < grid.length; g++) {
    const s = grid[g]!;
    if (s < series[0]!.step || s > series[series.length - 1]!.step) continue;
    while (j + 1 < series.length && series[j + 1]!.step <= s) j++;
    const p = series[j]!;
    if (p.step === s) {
      out[g] = p.value;
      continue;
    }
    const q = series[j + 1]!;
    if (!Number.isFinite(p.value) || !Number.isFinite(q.value)) continue;
    const t = (Math.log(s) - Math.log(p.step)) / (Math.log(q.step) - Math.log(p.step));
    out[g] = p.value + t * (q.value - p.value);
  }
  return out;
}

/**
 * For a series measured now and then (the noise scale: a few measurements per run), the median of the
 * series' points in each grid step's stretch of the log axis, NaN where it has none. The stretches meet
 * halfway in log step between neighbouring grid steps; the first and last reach as far out as their inner
 * half. Interpolating between two measurements a thousand steps apart would invent the values between.
 * Points must be in increasing step order with steps > 0; non-finite values are skipped.
 */
export function valuesInLogBins(series: readonly SeriesPointLike[], grid: readonly number[]): number[] {
  const n = grid.length;
  const logs = grid.map((s) => Math.log(s));
  const edge = (k: number): number => (logs[k]! + logs[k + 1]!) / 2;
  const halfFirst = n > 1 ? (logs[1]! - logs[0]!) / 2 : Number.POSITIVE_INFINITY;
  const halfLast = n > 1 ? (logs[n - 1]! - logs[n - 2]!) / 2 : Number.POSITIVE_INFINITY;
  const bins: number[][] = grid.map(() => []);
  for (const p of series) {
    if (!Number.isFinite(p.value) || !(p.step > 0)) continue;
    const x = Math.log(p.step);
    if (n === 0 || x < logs[0]! - halfFirst || x > logs[n - 1]! + halfLast) continue;
    let k = 0;
    while (k < n - 1 && x >= edge(k)) k++;
    bins[k]!.push(p.value);
  }
  return bins.map((vs) => (vs.length === 0 ? Number.NaN : quantileSorted7(vs.sort((u, v) => u - v), 0.5)));
}

/** Hyndman & Fan definition 7 on values already sorted ascending; NaN for none. */
export function quantileSorted7(sorted: readonly number[], p: number): number {
  const n = sorted.length;
  if (n === 0) return Number.NaN;
  const h = (n - 1) * p;
  const lo = Math.floor(h);
  const hi = Math.min(n - 1, lo + 1);
  return sorted[lo]! + (h - lo) * (sorted[hi]! - sorted[lo]!);
}

export interface Band {
  /** Runs with a finite value at this step. */
  n: number;
  min: number;
  q1: number;
  median: number;
  q3: number;
  max: number;
}

/** The spread across runs at one step: non-finite values left out; all NaN when no run has a value. */
export function bandOf(values: readonly number[]): Band {
  const v = values.filter(Number.isFinite).sort((a, b) => a - b);
  return {
    n: v.length,
    min: v.length > 0 ? v[0]! : Number.NaN,
    q1: quantileSorted7(v, 0.25),
    median: quantileSorted7(v, 0.5),
    q3: quantileSorted7(v, 0.75),
    max: v.length > 0 ? v[v.length - 1]! : Number.NaN,
  };
}

/** One band per grid step over runs' values on that grid (`valuesByRun[run][gridIndex]`). */
export function bandsAcrossRuns(valuesByRun: readonly (readonly number[])[]): Band[] {
  const width = valuesByRun.reduce((w, r) => Math.max(w, r.length), 0);
  const out: Band[] = [];
  for (let g = 0; g < width; g++) out.push(bandOf(valuesByRun.map((r) => r[g] ?? Number.NaN)));
  return out;
}

export interface BootstrapOptions {
  /** Resamples drawn. Default 2000. */
  resamples?: number;
  /** Seed of the generator. Default 1. */
  seed?: number;
  /** Coverage of the interval. Default 0.95. */
  level?: number;
}

/**
 * Percentile-bootstrap interval of the median of `values` (non-finite values left out), e.g. of a layer's
 * transition step across seeds. Null with fewer than 2 values. With few runs the interval is as coarse as
 * the values themselves: it can only end at observed values or midpoints of them.
 */
export function bootstrapMedianInterval(values: readonly number[], options: BootstrapOptions = {}): { median: number; low: number; high: number; n: number } | null {
  const v = values.filter(Number.isFinite);
  if (v.length < 2) return null;
  const { resamples = 2000, seed = 1, level = 0.95 } = options;
  const rng = mulberry32(seed);
  const stats: number[] = [];
  const draw = new Array<number>(v.length);
  for (let r = 0; r < resamples; r++) {
    for (let i = 0; i < v.length; i++) draw[i] = v[Math.floor(rng() * v.length)]!;
    stats.push(quantileSorted7([...draw].sort((a, b) => a - b), 0.5));
  }
  stats.sort((a, b) => a - b);
  const tail = (1 - level) / 2;
  return { median: bandOf(v).median, low: quantileSorted7(stats, tail), high: quantileSorted7(stats, 1 - tail), n: v.length };
}

/**
 * Percentile-bootstrap interval of a power law's exponent: the (x, y) pairs (one per run: depth and steps to
 * transition, say) are resampled with replacement and refitted by log-log least squares ({@link fitPowerLaw});
 * resamples whose x has no spread are skipped. Null when the pairs cannot be fitted.
 */
export function bootstrapPowerLawExponent(
  xs: readonly number[],
  ys: readonly number[],
  options: BootstrapOptions = {},
): { slope: number; low: number; high: number; used: number } | null {
  const fit = fitPowerLaw(xs, ys);
  if (fit === null) return null;
  const { resamples = 2000, seed = 1, level = 0.95 } = options;
  const rng = mulberry32(seed);
  const n = Math.min(xs.length, ys.length);
  const slopes: number[] = [];
  const bx = new Array<number>(n);
  const by = new Array<number>(n);
  for (let r = 0; r < resamples; r++) {
    for (let i = 0; i < n; i++) {
      const k = Math.floor(rng() * n);
      bx[i] = xs[k]!;
      by[i] = ys[k]!;
    }
    const f = fitPowerLaw(bx, by);
    if (f !== null) slopes.push(f.slope);
  }
  if (slopes.length === 0) return null;
  slopes.sort((a, b) => a - b);
  const tail = (1 - level) / 2;
  return { slope: fit.slope, low: quantileSorted7(slopes, tail), high: quantileSorted7(slopes, 1 - tail), used: slopes.length };
}
