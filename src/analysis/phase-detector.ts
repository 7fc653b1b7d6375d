/**
 * Online drift/diffusion detection per layer and for the network.
 *
 * A layer drifts while, over the window, its weights moved more along the mean gradient than by minibatch
 * noise. Over a window of K steps the summed gradients are K·m; their signal part has squared norm
 * ≈ K²‖Ḡ‖² (Ḡ the gradient averaged along the path) and their noise part K·tr Σ/B (methods.md §10.3). The
 * level is the ratio of the two, the displacement ratio
 *   R = K·(‖m‖²/σ² − floor²) = K·‖m‖²/σ² − f,
 * with σ² = grad_diff_norm², half the mean squared difference of consecutive minibatch gradients (an estimate
 * of tr Σ/B that leaves out the gradient's slow change along the window; checked against the fixed-weight
 * measurement on real data) and floor² = f/K (the window's finite-population factor). Unlike a per-minibatch
 * SNR (≈ B/B_simple, a comparison of the batch with the noise scale), R does not depend on the batch size when
 * the learning rate scales with it: K·B is the window's examples, and a gradient that turns or oscillates along
 * the path shrinks Ḡ. Boundary 0 dB: R = 1. Windows without grad_diff_norm (stored by older versions) fall
 * back to the window's per-minibatch SNR, SNR_raw² − floor², which depends on the batch size; markers say which.
 *
 * Each layer's corrected SNR level in dB goes through a two-sided tabular CUSUM (Page 1954) around the
 * boundary, standardised by a robust running estimate of its window-to-window noise and clipped
 * against outliers. A signal below marks `diffusion-start`, one above marks `drift-start`; after a
 * signal only the opposite side is watched (hysteresis), so a phase does not flicker. The change is
 * placed where the level crossed the boundary, not where the detector became sure: at the peak of the
 * running sum of the standardised inputs since the previous change (the CUSUM without allowance),
 * interpolated in log-step between the two windows around it. The travel exponent only adjusts the
 * confidence: faster growth of the distance can come from a larger learning rate in diffusion
 * (methods.md §1.4), so it never marks drift by itself.
 */
import { checkOptions, type OptionSchema } from '../option-check.js';
import { RollingMedian } from './rolling-median.js';
import { Cusum } from './cusum.js';

export type PhaseName = 'drift' | 'diffusion' | 'undetermined';

export interface PhaseOptions {
  /** Boundary between drift and diffusion for the floor-corrected SNR, dB. Default 0. */
  boundaryDb?: number;
  /** CUSUM allowance, in noise units. Default 0.5. */
  k?: number;
  /** CUSUM decision interval, in noise units. Default 4. */
  h?: number;
  /** Standardised inputs are clipped to ±clip, so one outlier cannot decide. Default 2.5. */
  clip?: number;
  /** Noise of the SNR level (dB) assumed until `noiseWindows` windows give an estimate. Default 1.5. */
  noiseDb?: number;
  /** Windows in the running noise estimate (median absolute successive difference). Default 16. */
  noiseWindows?: number;
  /** Lower bound of the noise estimate, dB. Default 0.5. */
  minNoiseDb?: number;
  /** Corrected SNR levels are clamped below here, dB: deeper than this is all the same diffusion. Default −15. */
  floorClampDb?: number;
  /** Travel exponents above this corroborate drift, below it diffusion (confidence only). Default 0.75. */
  exponentSplit?: number;
  /**
   * By default the network's phase follows its own level (all weights pooled). Set a share in (0, 1] to
   * follow layers instead: the network is in diffusion once layers holding at least this share of the
   * trainable parameters are, and in drift while layers holding more than the rest drift (1: it diffuses when
   * every layer does; 0.5: a parameter-weighted majority). Windows without a network entry always use the
   * share rule, with share 1 when unset.
   */
  networkShare?: number;
}

export const PHASE_DEFAULTS: Readonly<Required<PhaseOptions>> = Object.freeze({
  boundaryDb: 0,
  k: 0.5,
  h: 4,
  clip: 2.5,
  noiseDb: 1.5,
  noiseWindows: 16,
  minNoiseDb: 0.5,
  floorClampDb: -15,
  exponentSplit: 0.75,
  networkShare: 0,
});

/** The range of each option; checked by the PhaseDetector, monitor() and `tidemark analyze` alike. */
export const PHASE_RULES: OptionSchema = Object.freeze({
  boundaryDb: { type: 'number' },
  k: { type: 'number', min: 0 },
  h: { type: 'number', above: 0 },
  clip: { type: 'number', above: 0 },
  noiseDb: { type: 'number', above: 0 },
  noiseWindows: { type: 'number', integer: true, min: 2, max: 10_000 },
  minNoiseDb: { type: 'number', min: 0 },
  floorClampDb: { type: 'number', max: 0 },
  exponentSplit: { type: 'number', above: 0, below: 2 },
  networkShare: { type: 'number', min: 0, max: 1 },
});

/** The per-layer numbers the detector reads from a window. */
export interface PhaseInputLayer {
  grad_snr: number;
  batches: number;
  travel_exponent: number | null;
  params: number;
  /** ‖m‖, the window's mean gradient norm (with grad_diff_norm, the displacement ratio). */
  grad_mean_norm?: number;
  /** The minibatch noise from consecutive differences, sqrt(tr Σ/B) estimated within the window. */
  grad_diff_norm?: number;
}

/** The window fields the detector reads (a WindowRecord has them all). */
export interface PhaseInput {
  step: number;
  first_step: number;
  batches: number;
  snr_floor: number;
  layers: Record<string, PhaseInputLayer>;
  /** All layers pooled: the network's own level (absent: the network follows the layers). */
  network?: PhaseInputLayer;
}

/** The displacement ratio R in dB, clamped below; NaN when the inputs say nothing. */
export function displacementDb(meanNorm: number, noiseNorm: number, batches: number, floor: number, clampDb: number): number {
  if (!Number.isFinite(meanNorm) || !(noiseNorm > 0) || !(batches > 0)) return Number.NaN;
  const r = batches * ((meanNorm * meanNorm) / (noiseNorm * noiseNorm) - floor * floor);
  return 10 * Math.log10(Math.max(r, 10 ** (clampDb / 10)));
}

/**
 * The pure-noise floor of one layer in a window: the window's sqrt(f/K), rescaled to the layer's own K
 * (a layer that lost minibatches to non-finite gradients has fewer).
 */
function layerFloor(w: Pick<PhaseInput, 'snr_floor' | 'batches'>, l: Pick<PhaseInputLayer, 'batches'>): number {
  return l.batches > 0 ? w.snr_floor * Math.sqrt(w.batches / l.batches) : Number.NaN;
}

/**
 * The displacement level of a layer (or the network) in a window, in dB: what the detector follows, for
 * the page, the CLI and scripts to draw. NaN for windows stored without grad_diff_norm.
 */
export function displacementLevelDb(
  w: Pick<PhaseInput, 'snr_floor' | 'batches'>,
  l: Pick<PhaseInputLayer, 'batches' | 'grad_mean_norm' | 'grad_diff_norm'>,
  clampDb: number = PHASE_DEFAULTS.floorClampDb,
): number {
  if (l.grad_diff_norm === undefined || l.grad_mean_norm === undefined) return Number.NaN;
  return displacementDb(l.grad_mean_norm, l.grad_diff_norm, l.batches, layerFloor(w, l), clampDb);
}

const METHOD_DISPLACEMENT = 'tabular CUSUM (Page 1954) on the displacement ratio K·‖m‖²/σ² − f in dB (σ² from consecutive minibatch differences)';
const METHOD_WINDOW = 'tabular CUSUM (Page 1954) on the floor-corrected window SNR in dB (no grad_diff_norm in the window: depends on the batch size)';

export interface PhaseChange {
  /** Layer name, or null for the network. */
  layer: string | null;
  kind: 'drift-start' | 'diffusion-start';
  /** Estimated step of the change. */
  step: number;
  /** Step of the window at which it was detected. */
  detected_step: number;
  confidence: number;
  details: Record<string, unknown>;
}

export interface PhaseSnapshot {
  network: PhaseName;
  layers: Record<string, PhaseName>;
  /** Step at which each layer's current phase began (estimated), or null while undetermined. */
  since: Record<string, number | null>;
  networkSince: number | null;
}

/** Windows of history kept per layer (at least): the noise estimate and the search for where a change began. */
const HISTORY = 64;

interface LayerTrack {
  cusum: Cusum;
  phase: PhaseName;
  since: number | null;
  /** Ring buffers over the last `cap` windows with a finite level, indexed by input index mod `cap`. */
  firstSteps: Float64Array;
  centers: Float64Array;
  levels: Float64Array;
  /** Standardised, clipped inputs that went into the CUSUM. */
  zs: Float64Array;
  /** The last `noiseWindows` absolute successive differences of the level: in arrival order (ring) and sorted. */
  /** Median of the last `noiseWindows` absolute level differences. */
  diffs: RollingMedian;
  /** Windows with a finite level seen. */
  n: number;
  /** Input index of the window at which the current phase was detected (−1 before any). */
  changedAt: number;
  params: number;
}



/** Floor-corrected SNR level of one layer in dB, clamped below. */
export function correctedSnrDb(snr: number, floor: number, clampDb: number, lowest = 10 ** (clampDb / 10)): number {
  if (!Number.isFinite(snr)) return Number.NaN;
  const c2 = snr * snr - floor * floor;
  return 10 * Math.log10(Math.max(c2, lowest));
}

export class PhaseDetector {
  private readonly o: Required<PhaseOptions>;
  private readonly tracks = new Map<string, LayerTrack>();
  /** The network's own track, when windows carry a network entry and no networkShare is set. */
  private networkTrack: LayerTrack | null = null;
  private network: PhaseName = 'undetermined';
  private networkSince: number | null = null;
  /** Floor-corrected squared SNR below which levels are clamped: 10^(floorClampDb/10). */
  private readonly lowestSq: number;
  /** The length of each layer's ring buffers. */
  private readonly cap: number;

  constructor(options: PhaseOptions = {}) {
    this.o = checkOptions(options, PHASE_RULES, PHASE_DEFAULTS, { owner: 'PhaseDetector' }) as Required<PhaseOptions>;
    this.cap = Math.max(HISTORY, this.o.noiseWindows + 1);
    this.lowestSq = 10 ** (this.o.floorClampDb / 10);
  }

  get options(): Readonly<Required<PhaseOptions>> {
    return this.o;
  }

  /** Feeds one window; returns the changes it revealed (layers first, then the network). */
  update(w: PhaseInput): PhaseChange[] {
    const o = this.o;
    const changes: PhaseChange[] = [];
    const center = (w.first_step + w.step) / 2;
    const cap = this.cap;
    // The network's own entry goes last, so its change follows the layers'.
    const entries: [string | null, PhaseInputLayer][] = Object.entries(w.layers);
    const ownNetwork = w.network !== undefined && !(o.networkShare > 0);
    if (ownNetwork) entries.push([null, w.network!]);
    for (const [key, l] of entries) {
      let t = key === null ? this.networkTrack : this.tracks.get(key);
      if (t == null) {
        t = this.newTrack(l.params);
        if (key === null) this.networkTrack = t;
        else this.tracks.set(key, t);
      }
      const displaced = l.grad_diff_norm !== undefined && l.grad_diff_norm > 0 && l.grad_mean_norm !== undefined;
      const level = displaced
        ? displacementLevelDb(w, l, o.floorClampDb)
        : correctedSnrDb(l.grad_snr, layerFloor(w, l), o.floorClampDb, this.lowestSq);
      if (!Number.isFinite(level)) continue; // a window with no clean minibatches says nothing
      const i = t.n++;
      const slot = i % cap;
      t.firstSteps[slot] = w.first_step;
      t.centers[slot] = center;
      t.levels[slot] = level;
      const noise = this.noise(t, i);
      const z = Math.max(-o.clip, Math.min(o.clip, (level - o.boundaryDb) / noise));
      t.zs[slot] = z;
      const signal = t.cusum.push(z);
      const s = t.cusum.state;
      let kind: PhaseChange['kind'] | null = null;
      if (signal === 'down' && t.phase !== 'diffusion') kind = 'diffusion-start';
      else if (signal === 'up' && t.phase !== 'drift') kind = 'drift-start';
      if (kind === null) {
        // Hysteresis: the side that agrees with the current phase carries no news; keep it at 0.
        if (signal !== null) t.cusum.resetSide(signal);
        continue;
      }
      const step = Math.min(this.placeChange(t, kind), w.step);
      const exponent = l.travel_exponent;
      const corroborated =
        exponent === null ? null : kind === 'diffusion-start' ? exponent < o.exponentSplit : exponent > o.exponentSplit;
      const excess = Math.max(s.upper, s.lower) / o.h;
      const confidence = Math.min(1, 0.55 + 0.15 * Math.min(1, excess - 1) + (corroborated === true ? 0.3 : corroborated === null ? 0.1 : 0));
      changes.push({
        layer: key,
        kind,
        step,
        detected_step: w.step,
        confidence,
        details: {
          method: displaced ? METHOD_DISPLACEMENT : METHOD_WINDOW,
          level_db: level,
          noise_db: noise,
          boundary_db: o.boundaryDb,
          travel_exponent: exponent,
          exponent_agrees: corroborated,
        },
      });
      t.phase = kind === 'drift-start' ? 'drift' : 'diffusion';
      t.since = step;
      t.changedAt = i;
      t.cusum.reset();
    }
    if (ownNetwork) {
      if (this.networkTrack !== null) {
        this.network = this.networkTrack.phase;
        this.networkSince = this.networkTrack.since;
      }
      return changes;
    }
    const net = this.networkChange(w, changes);
    if (net !== null) changes.push(net);
    return changes;
  }

  private newTrack(params: number): LayerTrack {
    return {
      cusum: new Cusum({ k: this.o.k, h: this.o.h }),
      phase: 'undetermined',
      since: null,
      firstSteps: new Float64Array(this.cap),
      centers: new Float64Array(this.cap),
      levels: new Float64Array(this.cap),
      zs: new Float64Array(this.cap),
      diffs: new RollingMedian(this.o.noiseWindows),
      n: 0,
      changedAt: -1,
      params,
    };
  }

  /**
   * Where the level crossed the boundary. Over the windows since the previous change (at most the 64 kept),
   * the old phase ends at the window where the running sum of the standardised inputs, signed towards the
   * old phase, peaks: the CUSUM with no allowance. Its peak is the maximum-likelihood change point when the
   * mean moves between two values symmetric about the boundary (Hinkley 1970, from memory), so the change
   * sits at the crossing itself, not where the level had fallen k noise units past it, as the last zero of
   * the detecting sum would place it (that put changes late by up to 10 % of t* on slow slides). The step
   * is interpolated in log-step between the centres of that window and the next, whose inputs straddle 0
   * there; a phase that holds from the first window seen starts at its first step.
   */
  private placeChange(t: LayerTrack, kind: PhaseChange['kind']): number {
    const cap = this.cap;
    const last = t.n - 1;
    const start = Math.max(t.changedAt + 1, t.n - cap);
    const sign = kind === 'diffusion-start' ? 1 : -1;
    let acc = 0;
    let best = 0;
    let split = start - 1; // last window on the old side
    for (let i = start; i <= last; i++) {
      acc += sign * t.zs[i % cap]!;
      if (acc > best) {
        best = acc;
        split = i;
      }
    }
    const next = Math.min(split + 1, last);
    const fallback = t.firstSteps[next % cap]!;
    if (split < start || split >= last) return fallback;
    const z0 = sign * t.zs[split % cap]!;
    const z1 = sign * t.zs[next % cap]!;
    if (!(z0 - z1 > 0)) return fallback;
    const c0 = Math.log(t.centers[split % cap]!);
    const c1 = Math.log(t.centers[next % cap]!);
    return Math.round(Math.exp(c0 + (z0 / (z0 - z1)) * (c1 - c0)));
  }

  /**
   * Robust noise of the level: 1.4826·median|Δ|/√2 over the last `noiseWindows` successive differences
   * (the MAD of differences estimates the level's own standard deviation); `noiseDb` until there are 5.
   */
  private noise(t: LayerTrack, i: number): number {
    const o = this.o;
    const cap = this.cap;
    const w = this.o.noiseWindows;
    if (i > 0) t.diffs.push(Math.abs(t.levels[i % cap]! - t.levels[(i - 1) % cap]!));
    if (Math.min(i, w) < 5) return o.noiseDb;
    const med = t.diffs.median();
    return Math.max(o.minNoiseDb, (1.4826 * med) / Math.SQRT2);
  }

  private networkChange(w: PhaseInput, layerChanges: PhaseChange[]): PhaseChange | null {
    let total = 0;
    const weight: Record<PhaseName, number> = { drift: 0, diffusion: 0, undetermined: 0 };
    for (const t of this.tracks.values()) {
      total += t.params;
      weight[t.phase] += t.params;
    }
    if (total === 0) return null;
    const share = this.o.networkShare > 0 ? this.o.networkShare : 1;
    // Diffusion needs `share` of the parameters; drift needs more than what is left over.
    const enough = (phase: PhaseName, w: number): boolean =>
      phase === 'diffusion' ? w / total >= share - 1e-12 : w / total > 1 - share + 1e-12;
    let next: PhaseName = this.network;
    if (this.network !== 'drift' && enough('drift', weight.drift)) next = 'drift';
    else if (this.network !== 'diffusion' && enough('diffusion', weight.diffusion)) next = 'diffusion';
    if (next === this.network || next === 'undetermined') return null;
    // Place the network's change where the layer that tipped the balance changed; name the first one.
    const inPhase = [...this.tracks.entries()].filter(([, t]) => t.phase === next && t.since !== null);
    inPhase.sort((a, b) => a[1].since! - b[1].since!);
    let acc = 0;
    let tipping = inPhase[inPhase.length - 1]!;
    for (const entry of inPhase) {
      acc += entry[1].params;
      if (enough(next, acc)) {
        tipping = entry;
        break;
      }
    }
    const kind = next === 'drift' ? 'drift-start' : 'diffusion-start';
    const pending = [...this.tracks.entries()].filter(([, t]) => t.phase !== next).map(([n]) => n);
    const confidences = layerChanges.filter((c) => c.kind === kind).map((c) => c.confidence);
    this.network = next;
    this.networkSince = tipping[1].since;
    return {
      layer: null,
      kind,
      step: tipping[1].since!,
      detected_step: w.step,
      confidence: confidences.length > 0 ? Math.max(...confidences) : 0.6,
      details: {
        rule:
          next === 'diffusion'
            ? `at least ${Math.round(share * 100)}% of the trainable parameters in layers that diffuse`
            : `more than ${Math.round((1 - share) * 100)}% of the trainable parameters in layers that drift`,
        share: weight[next] / total,
        first_layer: inPhase[0]?.[0] ?? null,
        first_step: inPhase[0]?.[1].since ?? null,
        tipping_layer: tipping[0],
        layers_not_yet: pending,
      },
    };
  }

  snapshot(): PhaseSnapshot {
    const layers: Record<string, PhaseName> = {};
    const since: Record<string, number | null> = {};
    for (const [name, t] of this.tracks) {
      layers[name] = t.phase;
      since[name] = t.since;
    }
    return { network: this.network, layers, since, networkSince: this.networkSince };
  }
}

export interface DetectedPhases {
  /** The state after each window, in order. */
  states: PhaseSnapshot[];
  changes: PhaseChange[];
}

/** Runs the online detector over stored windows: the same result the monitor produced live. */
export function detectPhases(windows: readonly PhaseInput[], options: PhaseOptions = {}): DetectedPhases {
  const d = new PhaseDetector(options);
  const states: PhaseSnapshot[] = [];
  const changes: PhaseChange[] = [];
  for (const w of windows) {
    changes.push(...d.update(w));
    states.push(d.snapshot());
  }
  return { states, changes };
}
