/**
 * The local growth exponent of weight travel ||w_t − w_0|| against step t: about 1 while SGD
 * drifts, about ½ for a random walk, and well below ½ just after a drift stops (methods.md §3.3).
 */
import { fitPowerLaw } from './power-law.js';

export interface TravelExponentOptions {
  /** Fewest windows in a fit. Default 4. */
  minWindows?: number;
  /** Least ratio last step / first step in a fit. Default 2. */
  minSpan?: number;
  /** Fit the windows whose step is at least lastStep / lookback (at least `minWindows` of them). Default 4. */
  lookback?: number;
}

export const TRAVEL_EXPONENT_DEFAULTS: Readonly<Required<TravelExponentOptions>> = Object.freeze({
  minWindows: 4,
  minSpan: 2,
  lookback: 4,
});

/** Local log-log slope over the recent windows, or null until enough windows span enough steps. */
export function travelExponent(
  steps: ArrayLike<number>,
  travels: ArrayLike<number>,
  options: TravelExponentOptions = {},
): number | null {
  const { minWindows, minSpan, lookback } = { ...TRAVEL_EXPONENT_DEFAULTS, ...options };
  const n = Math.min(steps.length, travels.length);
  if (n < minWindows) return null;
  const last = steps[n - 1]!;
  let start = n - minWindows;
  while (start > 0 && steps[start - 1]! >= last / lookback) start--;
  const first = steps[start]!;
  if (!(first > 0) || last / first < minSpan) return null;
  const fit = fitPowerLaw(
    Array.prototype.slice.call(steps, start, n) as number[],
    Array.prototype.slice.call(travels, start, n) as number[],
  );
  if (fit === null || fit.n < minWindows) return null;
  return fit.slope;
}
