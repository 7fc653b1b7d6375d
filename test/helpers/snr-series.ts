/**
 * Synthetic per-window gradient-SNR series with a known truth, shaped like the windows monitor() records,
 * for checking the phase detector.
 *
 * Units: a layer's population SNR at the training batch size B is S(t) = ||G(t)|| / sqrt(tr Σ / B)
 * (methods.md §1.4), so one minibatch gradient is S(t)·u + ε with a fixed unit direction u and noise ε of
 * squared norm 1 on average. A window of K minibatch gradients at steps a..b then reads, in expectation:
 *   ||m||² = mean(S)² + f/K              (f: finite-population factor of the window, Cochran; 1 if i.i.d.)
 *   ||s||² = 1 + var(S)·K/(K − 1)       (the signal's change inside the window adds to the spread)
 * and the raw SNR is sqrt(||m||²/||s||²): the pure-noise floor is inside it (raw² = signal² + floor² for a
 * constant signal), and a window that straddles a change mixes both sides in proportion to its steps.
 * Measurement noise is Gaussian in dB on the raw SNR, plus a few per cent of outliers of ±6..15 dB.
 *
 * Windows follow the monitor's 'auto' schedule (src/callback/window-schedule.ts): 8 steps, ×1.25 a
 * window, until a window would reach an epoch; from then on they end at epoch ends. The recorded floor is
 * what the monitor records, sqrt(f/K) with the M it knows (none during the first epoch), while the raw
 * SNR uses the true f.
 *
 * The travel exponent comes from the expected distance of §3.2–3.3 in the same units (learning rate 1):
 * ||w_t − w_0||² = (Σ_{s≤t} S(s))² + t, fitted over the same windows as `travelExponent` (the least-squares
 * log-log slope over the windows back to a quarter of the last step, at least 4 spanning a factor 2), without
 * the confidence interval that makes the library's fit slower.
 */
import type { PhaseInput, PhaseInputLayer } from '../../src/analysis/phase-detector.js';
import { finitePopulationFactor, snrFloor } from '../../src/analysis/gradient-stats.js';
import { TRAVEL_EXPONENT_DEFAULTS } from '../../src/analysis/travel-exponent.js';
import { WindowSchedule } from '../../src/callback/window-schedule.js';
import { gaussian, mulberry32 } from './random.js';

/** Population SNR S(t) (amplitude, noise units) at step t ≥ 1. */
export type SnrProfile = (step: number) => number;

export const dbToAmp = (db: number): number => 10 ** (db / 20);
export const ampToDb = (a: number): number => 20 * Math.log10(a);

/** Noise levels of the checks: Gaussian σ of the raw SNR in dB. */
export const NOISE_DB = Object.freeze({ low: 0.5, middle: 1.5, high: 3 });

export function constantSnr(db: number): SnrProfile {
  const a = dbToAmp(db);
  return () => a;
}

/** S = drift level before step tStar, diffusion level from tStar on. t* = tStar. */
export function sharpDrop(tStar: number, driftDb: number, diffusionDb: number): SnrProfile {
  const hi = dbToAmp(driftDb);
  const lo = dbToAmp(diffusionDb);
  return (t) => (t < tStar ? hi : lo);
}

/**
 * S in dB falls linearly in log(step) from the drift level to the diffusion level over `decades` decades
 * (flat outside), placed so that it crosses 0 dB exactly at tStar: t* is where the population SNR crosses
 * 0 dB (SNR(B) = 1, B = B_simple, methods.md §1.4).
 */
export function spreadDrop(tStar: number, driftDb: number, diffusionDb: number, decades = 1): SnrProfile {
  if (!(driftDb > 0 && diffusionDb < 0)) throw new RangeError('the levels must straddle 0 dB');
  const start = Math.log10(tStar) - (decades * driftDb) / (driftDb - diffusionDb);
  const end = start + decades;
  return (t) => {
    const u = Math.log10(t);
    const db = u <= start ? driftDb : u >= end ? diffusionDb : driftDb + ((diffusionDb - driftDb) * (u - start)) / decades;
    return dbToAmp(db);
  };
}

/** `before` up to step `at` (exclusive), then `after` (e.g. a new task). */
export function switchAt(at: number, before: SnrProfile, after: SnrProfile): SnrProfile {
  return (t) => (t < at ? before(t) : after(t));
}

/** The span and sampling facts of one window, as the monitor closes it. */
export interface WindowSpan {
  first_step: number;
  step: number;
  batches: number;
  /** M as the monitor records it: null during the first epoch and outside fit. */
  batches_per_epoch: number | null;
  pass_batches: number[];
  /** The window's true finite-population factor (known M). */
  trueFactor: number;
}

const spanCache = new Map<string, readonly WindowSpan[]>();

/**
 * Window spans of the 'auto' schedule. With `stepsPerEpoch` the run is a fit over shuffled epochs of that
 * many minibatches (windows cap at an epoch); without it a custom loop of independent draws (windows grow
 * to 1024 steps).
 */
export function autoWindowSpans(windows: number, stepsPerEpoch: number | null = null): readonly WindowSpan[] {
  const key = `${windows}/${stepsPerEpoch}`;
  const cached = spanCache.get(key);
  if (cached !== undefined) return cached;
  const spans = computeSpans(windows, stepsPerEpoch);
  spanCache.set(key, spans);
  return spans;
}

function computeSpans(windows: number, stepsPerEpoch: number | null): WindowSpan[] {
  const schedule = new WindowSchedule('auto');
  const out: WindowSpan[] = [];
  let step = 0;
  let pending = 0;
  let first = 1;
  let known: number | null = null;
  let passes: number[] = [];
  let passOpen = false;
  const close = (): void => {
    const M = stepsPerEpoch;
    out.push({
      first_step: first,
      step,
      batches: pending,
      batches_per_epoch: M === null ? null : known,
      pass_batches: M === null ? [] : passes,
      trueFactor: M === null ? 1 : finitePopulationFactor(pending, M, passes),
    });
    first = step + 1;
    pending = 0;
    passes = [];
    passOpen = false;
    schedule.closed();
  };
  if (stepsPerEpoch === null) {
    while (out.length < windows) {
      step++;
      pending++;
      if (schedule.closeAfterStep(pending, null, false)) close();
    }
    return out;
  }
  while (out.length < windows) {
    passOpen = false;
    for (let b = 0; b < stepsPerEpoch && out.length < windows; b++) {
      step++;
      pending++;
      if (!passOpen) {
        passes.push(0);
        passOpen = true;
      }
      passes[passes.length - 1]!++;
      if (schedule.closeAfterStep(pending, known, true)) {
        close();
        passOpen = false;
      }
    }
    if (out.length >= windows) break;
    if (known === null) known = stepsPerEpoch;
    if (schedule.closeAtEpochEnd(pending, known)) close();
  }
  return out;
}

export interface LayerSpec {
  name: string;
  params: number;
  profile: SnrProfile;
  /** Overrides the travel exponent (e.g. a learning-rate raise); default: from the expected distance. */
  exponent?: (span: WindowSpan, index: number) => number | null;
}

export interface SeriesOptions {
  windows: number;
  /** Minibatches per epoch (fit), or null for a custom loop of independent draws. Default 128. */
  stepsPerEpoch?: number | null;
  layers: readonly LayerSpec[];
  /** Gaussian noise of the raw SNR, dB. */
  noiseDb: number;
  /** Share of windows (per layer) carrying an outlier. Default 0.03. */
  outlierRate?: number;
  /** Outlier size range in dB, either sign. Default [6, 15]. */
  outlierDb?: readonly [number, number];
  seed: number;
}

/** Expected raw SNR of a window over steps a..b (population S per step, factor f). */
export function windowRawSnr(profile: SnrProfile, span: WindowSpan): number {
  const K = span.batches;
  let s1 = 0;
  let s2 = 0;
  for (let t = span.first_step; t <= span.step; t++) {
    const s = profile(t);
    s1 += s;
    s2 += s * s;
  }
  const mean = s1 / K;
  const varPop = Math.max(0, s2 / K - mean * mean);
  const meanSq = mean * mean + span.trueFactor / K;
  const spreadSq = 1 + (K > 1 ? (varPop * K) / (K - 1) : 0);
  return Math.sqrt(meanSq / spreadSq);
}

/** Least-squares slope of log travel on log step over the windows `travelExponent` would fit; null before. */
export function travelSlope(steps: readonly number[], travels: readonly number[]): number | null {
  const { minWindows, minSpan, lookback } = TRAVEL_EXPONENT_DEFAULTS;
  const n = steps.length;
  if (n < minWindows) return null;
  const last = steps[n - 1]!;
  let start = n - minWindows;
  while (start > 0 && steps[start - 1]! >= last / lookback) start--;
  if (last / steps[start]! < minSpan) return null;
  let sx = 0;
  let sy = 0;
  let sxx = 0;
  let sxy = 0;
  const m = n - start;
  for (let i = start; i < n; i++) {
    const x = Math.log(steps[i]!);
    const y = Math.log(travels[i]!);
    sx += x;
    sy += y;
    sxx += x * x;
    sxy += x * y;
  }
  return (sxy - (sx * sy) / m) / (sxx - (sx * sx) / m);
}

/** A series of detector inputs with the spans they came from. */
export interface Series {
  windows: PhaseInput[];
  spans: readonly WindowSpan[];
}

export function snrSeries(o: SeriesOptions): Series {
  const spans = autoWindowSpans(o.windows, o.stepsPerEpoch === undefined ? 128 : o.stepsPerEpoch);
  const rng = mulberry32(o.seed);
  const rate = o.outlierRate ?? 0.03;
  const [oMin, oMax] = o.outlierDb ?? [6, 15];
  const travel = o.layers.map(() => ({ cum: 0, steps: [] as number[], travels: [] as number[] }));
  const windows: PhaseInput[] = spans.map((span, i) => {
    const layers: Record<string, PhaseInputLayer> = {};
    o.layers.forEach((l, li) => {
      let db = ampToDb(windowRawSnr(l.profile, span)) + o.noiseDb * gaussian(rng);
      if (rng() < rate) db += (rng() < 0.5 ? -1 : 1) * (oMin + (oMax - oMin) * rng());
      const tr = travel[li]!;
      for (let t = span.first_step; t <= span.step; t++) tr.cum += l.profile(t);
      tr.steps.push(span.step);
      tr.travels.push(Math.sqrt(tr.cum * tr.cum + span.step));
      const exponent = l.exponent !== undefined ? l.exponent(span, i) : travelSlope(tr.steps, tr.travels);
      layers[l.name] = { grad_snr: dbToAmp(db), batches: span.batches, travel_exponent: exponent, params: l.params };
    });
    return {
      step: span.step,
      first_step: span.first_step,
      batches: span.batches,
      snr_floor: snrFloor(span.batches, span.batches_per_epoch, span.pass_batches),
      layers,
    };
  });
  return { windows, spans };
}

/** Index of the window whose steps contain `step` (the last window if it is beyond them). */
export function windowOf(spans: readonly WindowSpan[], step: number): number {
  for (let i = 0; i < spans.length; i++) if (step <= spans[i]!.step) return i;
  return spans.length - 1;
}

/** Log-uniform draw in [lo, hi]. */
export function logUniform(rng: () => number, lo: number, hi: number): number {
  return Math.exp(Math.log(lo) + (Math.log(hi) - Math.log(lo)) * rng());
}
