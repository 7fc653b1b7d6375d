/**
 * Largest-Triangle-Three-Buckets downsampling (S. Steinarsson 2013, "Downsampling Time Series for
 * Visual Representation", MSc thesis, University of Iceland; methods.md §7). Picks, from each bucket,
 * the point that spans the largest triangle with the previously kept point and the mean of the next
 * bucket, so peaks and dips survive where averaging or striding would flatten them.
 */

import { TidemarkRangeError } from '../errors.js';

/**
 * Indices of the points LTTB keeps when reducing the series `(xs[i], ys[i])` to `threshold` points.
 *
 * - `threshold` 0, or at least `n`: every index `0..n-1` (nothing to reduce).
 * - `threshold` 1 or 2 (with `n ≥ 2`): `[0, n-1]`, as in the reference code.
 * - Otherwise exactly `threshold` indices, strictly increasing, always including `0` and `n-1`.
 *
 * Middle bucket `i` (for `i = 0..threshold-3`) is `[⌊i·(n−2)/(threshold−2)⌋+1, ⌊(i+1)·(n−2)/(threshold−2)⌋+1)`,
 * computed in exact integer arithmetic. The reference code and the `downsample` package compute
 * `every = (n−2)/(threshold−2)` in floating point first, so `⌊i·every⌋` can land one below the true
 * value (e.g. n = 17, threshold = 13: 11·(15/11) = 14.999…): a point then moves to the neighbouring
 * bucket, or at the last boundary point n−2 is never a candidate. Exact bounds put every middle point
 * in exactly one bucket. Ties go to the first point (strict `>`).
 *
 * `xs` should be sorted ascending; spacing may be uneven, since areas use the real x values.
 * Bucket bounds are exact while `(n−2)·(threshold−2) < 2^52`.
 *
 * Non-finite values (NaN or ±Infinity in x or y) never win a bucket that holds a finite point, and
 * are left out of the next-bucket mean; a bucket of only non-finite points contributes its first
 * index. The anchor stays at the last kept finite point. When the next bucket has no finite point the
 * score is `|y − anchor y|` (the triangle's limit with a far-away apex level with the anchor); when
 * there is no finite anchor yet (point 0 non-finite) it is `|y − mean y of next bucket|`.
 *
 * @throws TidemarkRangeError (`TIDEMARK_ERR_OPTION_INVALID`) when the lengths differ or `threshold`
 *   is not a non-negative integer.
 */
export function lttb(xs: ArrayLike<number>, ys: ArrayLike<number>, threshold: number): number[] {
  const n = xs.length;
  if (ys.length !== n) {
    throw new TidemarkRangeError(
      'TIDEMARK_ERR_OPTION_INVALID',
      `lttb: xs has ${n} values but ys has ${ys.length}; pass one y per x.`,
    );
  }
  if (!Number.isInteger(threshold) || threshold < 0) {
    throw new TidemarkRangeError(
      'TIDEMARK_ERR_OPTION_INVALID',
      `lttb: threshold must be a non-negative integer, received ${String(threshold)}; use 0 to keep every point.`,
    );
  }
  if (threshold === 0 || threshold >= n) {
    const all = new Array<number>(n);
    for (let i = 0; i < n; i++) all[i] = i;
    return all;
  }
  // Here 1 ≤ threshold < n, so n ≥ 2.
  if (threshold < 3) return [0, n - 1];

  const inner = n - 2;
  const buckets = threshold - 2;
  const out = new Array<number>(threshold);
  out[0] = 0;

  let ax = xs[0]!;
  let ay = ys[0]!;
  // x − x === 0 is false exactly for NaN and ±Infinity.
  let haveAnchor = ax - ax === 0 && ay - ay === 0;

  let start = 1;
  let end = Math.floor(inner / buckets) + 1;
  for (let i = 0; i < buckets; i++) {
    // The next bucket; for the last middle bucket it is just the final point.
    const nextEnd = i + 2 <= buckets ? Math.floor(((i + 2) * inner) / buckets) + 1 : n;

    // Summed in index order, then divided, as the reference does, so ties resolve identically.
    // A finite plain sum proves every term finite; only otherwise filter (rare, so one cheap pass).
    let sx = 0;
    let sy = 0;
    for (let j = end; j < nextEnd; j++) {
      sx += xs[j]!;
      sy += ys[j]!;
    }
    let count = nextEnd - end;
    if (!(sx - sx === 0 && sy - sy === 0)) {
      sx = 0;
      sy = 0;
      count = 0;
      for (let j = end; j < nextEnd; j++) {
        const x = xs[j]!;
        const y = ys[j]!;
        if (x - x === 0 && y - y === 0) {
          sx += x;
          sy += y;
          count++;
        }
      }
    }
    const haveMean = count > 0;
    const cx = sx / count;
    const cy = sy / count;

    let best = -1;
    let bestArea = -1;
    if (haveAnchor && haveMean) {
      const dx = ax - cx;
      const dy = cy - ay;
      for (let j = start; j < end; j++) {
        const x = xs[j]!;
        const y = ys[j]!;
        // Twice the triangle area; the factor ½ changes no comparison. A non-finite x or y makes
        // it Infinity or NaN, so the finiteness check is needed only when a point would win.
        const area = Math.abs(dx * (y - ay) - (ax - x) * dy);
        if (area > bestArea && x - x === 0 && y - y === 0) {
          bestArea = area;
          best = j;
        }
      }
    } else {
      for (let j = start; j < end; j++) {
        const x = xs[j]!;
        const y = ys[j]!;
        if (!(x - x === 0 && y - y === 0)) continue;
        let area = 0;
        if (haveAnchor) area = Math.abs(y - ay);
        else if (haveMean) area = Math.abs(y - cy);
        if (area > bestArea) {
          bestArea = area;
          best = j;
        }
      }
    }
    // No winner: an all-non-finite bucket, or every area NaN because a difference overflowed.
    if (best < 0) best = firstFiniteIndex(xs, ys, start, end);
    out[i + 1] = best;
    const bx = xs[best]!;
    const by = ys[best]!;
    if (bx - bx === 0 && by - by === 0) {
      ax = bx;
      ay = by;
      haveAnchor = true;
    }

    start = end;
    end = nextEnd;
  }
  out[threshold - 1] = n - 1;
  return out;
}

/** First index in `[start, end)` whose x and y are finite, or `start` when there is none. */
function firstFiniteIndex(xs: ArrayLike<number>, ys: ArrayLike<number>, start: number, end: number): number {
  for (let j = start; j < end; j++) {
    const x = xs[j]!;
    const y = ys[j]!;
    if (x - x === 0 && y - y === 0) return j;
  }
  return start;
}

/** A point of a stored series, as the storage layer reads it. */
export interface SeriesPoint {
  step: number;
  value: number;
}

/**
 * The points of `points` (sorted by `step`) that {@link lttb} keeps, with `step` as x and `value` as
 * y. Returns the same objects, not copies.
 */
export function lttbPoints<T extends SeriesPoint>(points: readonly T[], threshold: number): T[] {
  const n = points.length;
  const xs = new Float64Array(n);
  const ys = new Float64Array(n);
  for (let i = 0; i < n; i++) {
    const p = points[i]!;
    xs[i] = p.step;
    ys[i] = p.value;
  }
  return lttb(xs, ys, threshold).map((i) => points[i]!);
}
