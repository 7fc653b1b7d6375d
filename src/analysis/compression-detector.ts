/**
 * Online detection of the start of compression per layer: a sustained fall of the layer's binned
 * I(X;T) (`mi_input`, bits), measured by the activation probe every few windows.
 *
 * Method, per layer, on its sequence of probe points x₀, x₁, … (a NaN or null value skips the layer
 * for that point; the detector counts probe points, not steps):
 *  1. Successive differences dₚ = xₚ − xₚ₋₁ carry the trend. Their noise scale σ is estimated from
 *     second differences eₚ = xₚ − 2xₚ₋₁ + xₚ₋₂, which do not see a straight-line trend, so a steady rise
 *     or fall neither inflates σ (as the MAD of dₚ around 0 would) nor makes the turn from rise to fall
 *     look like noise (as the MAD of dₚ around its median does while the window straddles the peak).
 *     For independent noise of s.d. σₓ, sd(e) = √6·σₓ and sd(d) = √2·σₓ, so σ = 1.4826·median|e|/√3
 *     (a difference-based scale as in Gasser, Sroka & Jennen-Steinmetz 1986, from memory), floored at
 *     `minScaleBits`. The median runs over the last 64 second differences, or over the last 8 times 0.8 when
 *     that is larger: a smooth rise (drift) followed by a noisy plateau would otherwise leave σ at its
 *     floor for some 30 points while the noise is already many times larger, and every three-point dip
 *     would signal. The 0.8 keeps the short median from raising σ when the noise is steady (common
 *     practice, no source; in simulation it cut such alarms eightfold for a 15 % longer delay).
 *  2. zₚ = dₚ/σ, clipped to ±(k + h/2), goes through Page's (1954) tabular CUSUM; its lower sum gathers
 *     the standardised fall. The clip means one or two points can add at most h to the sum, so a single
 *     wobble — which a near-noiseless rise can make look like many σ once σ sits at its floor — never
 *     signals alone: a fall has to last at least three points (common practice, no source).
 *  3. Testing starts at the point after `warmup` points. A lower-side signal while the layer is armed is
 *     a `compression-start`; the layer is then 'compressing' and only the upper (rise) side is watched,
 *     so a fall signals once per episode (hysteresis). An upper-side signal while compressing is a
 *     convincing re-expansion: the layer re-arms and a later fall gives a new event. A layer is armed from
 *     its first point, so a layer whose I(X;T) falls from the start compresses too.
 *  4. The fall is placed at the last point where the lower sum was 0, the usual CUSUM estimate of where
 *     a shift began (Page 1954; Montgomery, Introduction to Statistical Quality Control, CUSUM chapter).
 * Differencing makes in-control inputs negatively correlated, so the sum of inputs over any stretch is
 * (x_start − x_end)/σ and does not build up like a sum of independent terms: with a good σ, false alarms
 * are rarer than the in-control ARL of the plain chart (≈ 335 points one-sided at k = 0.5, h = 4).
 *
 * Only past and present points are used: feeding points one by one gives the same events as
 * `detectCompression` over the whole series, and later points never change earlier events.
 */
import { TidemarkRangeError, TidemarkTypeError } from '../errors.js';
import { checkOptionNames } from './binned-information.js';
import { RollingMedian, sortedMedian } from './rolling-median.js';
import { Cusum } from './cusum.js';

export interface CompressionOptions {
  /** CUSUM allowance, in σ units of the successive differences. Default 0.5. */
  k?: number;
  /** CUSUM decision interval, in σ units. Default 4. */
  h?: number;
  /** Probe points per layer before testing starts (an integer ≥ 1). Default 3. */
  warmup?: number;
  /**
   * Floor on σ, the noise scale of successive differences, bits. Default 0.02 (common practice, no
   * source): below it, changes are too small to matter for a binned estimate.
   */
  minScaleBits?: number;
}

export const COMPRESSION_DEFAULTS: Readonly<Required<CompressionOptions>> = Object.freeze({
  k: 0.5,
  h: 4,
  warmup: 3,
  minScaleBits: 0.02,
});

export interface CompressionEvent {
  layer: string;
  /** Estimated step where the fall began: the last point at which the CUSUM's fall sum was 0. */
  step: number;
  /** Step of the probe point at which the fall was signalled. */
  detected_step: number;
  /** 1 − exp(−S/h), S the fall sum at the signal (> h): from 0.63 just past h towards 1. A score, not a probability. */
  confidence: number;
  details: {
    /** Highest value since the layer was (re-)armed, bits. */
    peak_bits: number;
    /** Value at the detecting point, bits. */
    current_bits: number;
    /** peak_bits − current_bits. */
    drop_bits: number;
    /** Probe points from the estimated start to the detecting point (the detection delay in points). */
    points: number;
  };
}

/** Second differences kept per layer for the noise scale, and the recent ones that can raise it. */
const SCALE_WINDOW = 64;
const RECENT_WINDOW = 8;
const RECENT_WEIGHT = 0.8;
/** 1/Φ⁻¹(3/4): turns a median absolute deviation of normal noise into its s.d. */
const MAD_TO_SD = 1.4826;

const OPTION_NAMES = ['k', 'h', 'warmup', 'minScaleBits'] as const;

interface LayerTrack {
  cusum: Cusum;
  compressing: boolean;
  /** Finite points seen. */
  n: number;
  last: number;
  prev: number;
  peak: number;
  /** Point index and step where the fall sum was last 0. */
  topIndex: number;
  topStep: number;
  /** The last SCALE_WINDOW |second differences|. */
  diffs: RollingMedian;
}

function readOption(options: CompressionOptions, name: (typeof OPTION_NAMES)[number]): number {
  const v = options[name];
  if (v === undefined) return COMPRESSION_DEFAULTS[name];
  if (typeof v !== 'number') {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `CompressionDetector: option '${name}' must be a number; received ${String(v)}.`);
  }
  const ok =
    name === 'k' ? Number.isFinite(v) && v >= 0
    : name === 'warmup' ? Number.isInteger(v) && v >= 1
    : Number.isFinite(v) && v > 0;
  if (!ok) {
    const need = name === 'k' ? 'a finite number ≥ 0' : name === 'warmup' ? 'an integer ≥ 1' : 'a finite number > 0';
    throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', `CompressionDetector: option '${name}' must be ${need}; received ${String(v)}.`);
  }
  return v;
}




export class CompressionDetector {
  private readonly o: Readonly<Required<CompressionOptions>>;
  /** Standardised inputs are clipped here: two points add at most h, so a fall needs three. */
  private readonly clip: number;
  private readonly tracks = new Map<string, LayerTrack>();
  /** Scratch space for the recent second differences. */
  private readonly recent = new Float64Array(RECENT_WINDOW);

  constructor(options: CompressionOptions = {}) {
    if (options === null || typeof options !== 'object') {
      throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `CompressionDetector: options must be an object; received ${String(options)}.`);
    }
    checkOptionNames('CompressionDetector', options, OPTION_NAMES);
    this.o = Object.freeze({
      k: readOption(options, 'k'),
      h: readOption(options, 'h'),
      warmup: readOption(options, 'warmup'),
      minScaleBits: readOption(options, 'minScaleBits'),
    });
    this.clip = this.o.k + this.o.h / 2;
  }

  get options(): Readonly<Required<CompressionOptions>> {
    return this.o;
  }

  /** One probe point: per layer mi_input (NaN/null = skip that layer this time). Returns the events signalled at this point. */
  push(step: number, layers: Record<string, number | null>): CompressionEvent[] {
    if (typeof step !== 'number' || !Number.isFinite(step)) {
      throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `CompressionDetector.push: step must be a finite number; received ${String(step)}.`);
    }
    if (layers === null || typeof layers !== 'object') {
      throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `CompressionDetector.push: layers must be an object of layer name → bits; received ${String(layers)}.`);
    }
    const events: CompressionEvent[] = [];
    for (const name of Object.keys(layers)) {
      const x = layers[name];
      if (typeof x !== 'number' || !Number.isFinite(x)) continue; // no measurement this time
      const event = this.pushLayer(name, step, x);
      if (event !== null) events.push(event);
    }
    return events;
  }

  /** Whether the layer is currently considered compressing. */
  compressing(layer: string): boolean {
    return this.tracks.get(layer)?.compressing ?? false;
  }

  private pushLayer(name: string, step: number, x: number): CompressionEvent | null {
    const o = this.o;
    let t = this.tracks.get(name);
    if (t === undefined) {
      t = {
        cusum: new Cusum({ k: o.k, h: o.h }),
        compressing: false,
        n: 0,
        last: Number.NaN,
        prev: Number.NaN,
        peak: x,
        topIndex: 0,
        topStep: step,
        diffs: new RollingMedian(SCALE_WINDOW),
      };
      this.tracks.set(name, t);
    }
    const p = t.n++;
    if (p >= 2) this.addSecondDifference(t, Math.abs(x - 2 * t.last + t.prev));
    const d = p >= 1 ? x - t.last : 0;
    t.prev = t.last;
    t.last = x;
    if (!t.compressing) t.peak = Math.max(t.peak, x);
    if (p < o.warmup) {
      // Until testing starts the top of a fall is simply the highest point.
      if (x >= t.peak) {
        t.topIndex = p;
        t.topStep = step;
      }
      return null;
    }
    const sigma = this.scale(t);
    const z = Math.max(-this.clip, Math.min(this.clip, d / sigma));
    const signal = t.cusum.push(z);
    const s = t.cusum.state;
    if (s.lower === 0) {
      t.topIndex = p;
      t.topStep = step;
    }
    if (signal === 'down' && !t.compressing) {
      const fall = s.lower;
      const event: CompressionEvent = {
        layer: name,
        step: t.topStep,
        detected_step: step,
        confidence: 1 - Math.exp(-fall / o.h),
        details: { peak_bits: t.peak, current_bits: x, drop_bits: t.peak - x, points: p - t.topIndex },
      };
      t.compressing = true;
      t.cusum.reset();
      return event;
    }
    if (signal === 'up' && t.compressing) {
      // Convincing re-expansion: watch for the next fall from here.
      t.compressing = false;
      t.cusum.reset();
      t.peak = x;
      t.topIndex = p;
      t.topStep = step;
      return null;
    }
    // Hysteresis: a signal that agrees with the current state carries no news; keep that side at 0.
    if (signal !== null) t.cusum.resetSide(signal);
    return null;
  }

  private addSecondDifference(t: LayerTrack, v: number): void {
    t.diffs.push(v);
  }

  /** σ of successive differences: 1.4826·median|e|/√3 (long or deflated recent median), floored; the floor alone before any second difference. */
  private scale(t: LayerTrack): number {
    if (t.diffs.size === 0) return this.o.minScaleBits;
    const r = Math.min(t.diffs.pushed, RECENT_WINDOW);
    const recent = this.recent;
    for (let i = 0; i < r; i++) recent[i] = t.diffs.recent(i);
    const med = Math.max(t.diffs.median(), RECENT_WEIGHT * sortedMedian(recent.subarray(0, r).sort(), r));
    return Math.max(this.o.minScaleBits, (MAD_TO_SD * med) / Math.sqrt(3));
  }
}

/** Offline: the events of feeding the points to a CompressionDetector in order (the same, causal, result). */
export function detectCompression(
  points: { step: number; layers: Record<string, number | null> }[],
  options: CompressionOptions = {},
): CompressionEvent[] {
  const d = new CompressionDetector(options);
  const events: CompressionEvent[] = [];
  for (const pt of points) events.push(...d.push(pt.step, pt.layers));
  return events;
}
