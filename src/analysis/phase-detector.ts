/**
 * Online drift/diffusion detection per layer and for the network.
 *
 * A layer drifts while its minibatch gradients agree: the population SNR at the training batch size,
 * SNR(B) = sqrt(B/B_simple), is above 1. Its estimate from a window is the raw SNR with the pure-noise
 * floor removed, SNR_corr² = SNR_raw² − floor² (methods.md §1.4); the boundary 0 dB is where the batch
 * size equals the noise scale (McCandlish et al. 2018), the common rule of thumb of SNR ≈ 1.
 *
 * Each layer's corrected SNR level in dB goes through a two-sided tabular CUSUM (Page 1954) around the
 * boundary, standardised by a robust running estimate of its window-to-window noise and clipped
 * against outliers. A signal below marks `diffusion-start`, one above marks `drift-start`; after a
 * signal only the opposite side is watched (hysteresis), so a phase does not flicker. The change is
 * placed after the last window where that side's sum was zero, i.e. where the level crossed the
 * boundary, not where the detector became sure. The travel exponent only adjusts the confidence:
 * faster growth of the distance can come from a larger learning rate in diffusion (methods.md §1.4),
 * so it never marks drift by itself.
 */
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
   * The network is in diffusion once layers holding at least this share of the trainable parameters
   * are, and in drift while layers holding more than the rest drift. Default 1: the network diffuses
   * when every layer does and drifts while any layer drifts (0.5 gives a parameter-weighted majority).
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
  networkShare: 1,
});

/** The per-layer numbers the detector reads from a window. */
export interface PhaseInputLayer {
  grad_snr: number;
  batches: number;
  travel_exponent: number | null;
  params: number;
}

/** The window fields the detector reads (a WindowRecord has them all). */
export interface PhaseInput {
  step: number;
  first_step: number;
  batches: number;
  snr_floor: number;
  layers: Record<string, PhaseInputLayer>;
}

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

interface LayerTrack {
  cusum: Cusum;
  phase: PhaseName;
  since: number | null;
  /** first_step, mid-step and level of each window seen, by input index, to place changes. */
  firstSteps: number[];
  centers: number[];
  history: number[];
  /** The recent levels, for the noise estimate. */
  levels: number[];
  params: number;
}

function median(values: number[]): number {
  const s = values.slice().sort((a, b) => a - b);
  const m = s.length >> 1;
  return s.length % 2 === 1 ? s[m]! : (s[m - 1]! + s[m]!) / 2;
}

/** Floor-corrected SNR level of one layer in dB, clamped below. */
export function correctedSnrDb(snr: number, floor: number, clampDb: number): number {
  if (!Number.isFinite(snr)) return Number.NaN;
  const c2 = snr * snr - floor * floor;
  const lowest = 10 ** (clampDb / 10);
  return 10 * Math.log10(Math.max(c2, lowest));
}

export class PhaseDetector {
  private readonly o: Required<PhaseOptions>;
  private readonly tracks = new Map<string, LayerTrack>();
  private network: PhaseName = 'undetermined';
  private networkSince: number | null = null;

  constructor(options: PhaseOptions = {}) {
    this.o = { ...PHASE_DEFAULTS, ...options };
  }

  get options(): Readonly<Required<PhaseOptions>> {
    return this.o;
  }

  /** Feeds one window; returns the changes it revealed (layers first, then the network). */
  update(w: PhaseInput): PhaseChange[] {
    const o = this.o;
    const changes: PhaseChange[] = [];
    // The window's floor is sqrt(f/K); a layer that lost minibatches to NaN has its own K.
    const fOverK = w.snr_floor * w.snr_floor;
    for (const [name, l] of Object.entries(w.layers)) {
      let t = this.tracks.get(name);
      if (t === undefined) {
        t = {
          cusum: new Cusum({ k: o.k, h: o.h }),
          phase: 'undetermined',
          since: null,
          firstSteps: [],
          centers: [],
          history: [],
          levels: [],
          params: l.params,
        };
        this.tracks.set(name, t);
      }
      const floor = l.batches > 0 ? Math.sqrt((fOverK * w.batches) / l.batches) : Number.NaN;
      const level = correctedSnrDb(l.grad_snr, floor, o.floorClampDb);
      if (!Number.isFinite(level)) continue; // a window with no clean minibatches says nothing
      t.levels.push(level);
      t.firstSteps.push(w.first_step);
      t.centers.push((w.first_step + w.step) / 2);
      t.history.push(level);
      if (t.levels.length > o.noiseWindows + 1) t.levels.shift();
      const noise = this.noise(t.levels);
      const z = Math.max(-o.clip, Math.min(o.clip, (level - o.boundaryDb) / noise));
      const signal = t.cusum.push(z);
      const s = t.cusum.state;
      let kind: PhaseChange['kind'] | null = null;
      let zeroAt = -1;
      if (signal === 'down' && t.phase !== 'diffusion') {
        kind = 'diffusion-start';
        zeroAt = s.lowerZeroAt;
      } else if (signal === 'up' && t.phase !== 'drift') {
        kind = 'drift-start';
        zeroAt = s.upperZeroAt;
      }
      if (kind === null) {
        // Hysteresis: the side that agrees with the current phase carries no news; keep it at 0.
        if (signal !== null) t.cusum.resetSide(signal);
        continue;
      }
      const step = this.placeChange(t, Math.min(zeroAt + 1, t.firstSteps.length - 1));
      const exponent = l.travel_exponent;
      const corroborated =
        exponent === null ? null : kind === 'diffusion-start' ? exponent < o.exponentSplit : exponent > o.exponentSplit;
      const excess = Math.max(s.upper, s.lower) / o.h;
      const confidence = Math.min(1, 0.55 + 0.15 * Math.min(1, excess - 1) + (corroborated === true ? 0.3 : corroborated === null ? 0.1 : 0));
      changes.push({
        layer: name,
        kind,
        step: Math.min(step, w.step),
        detected_step: w.step,
        confidence,
        details: {
          method: 'tabular CUSUM (Page 1954) on the floor-corrected SNR in dB',
          level_db: level,
          noise_db: noise,
          boundary_db: o.boundaryDb,
          travel_exponent: exponent,
          exponent_agrees: corroborated,
        },
      });
      t.phase = kind === 'drift-start' ? 'drift' : 'diffusion';
      t.since = Math.min(step, w.step);
      t.cusum.reset();
    }
    const net = this.networkChange(w, changes);
    if (net !== null) changes.push(net);
    return changes;
  }

  /**
   * Where the level crossed the boundary: interpolated in log-step between the centres of the last
   * window on the old side and the first on the new side; else the first step of the window where the
   * CUSUM began to accumulate.
   */
  private placeChange(t: LayerTrack, index: number): number {
    const b = this.o.boundaryDb;
    const prev = index - 1;
    const fallback = t.firstSteps[index]!;
    if (prev < 0) return fallback;
    const l0 = t.history[prev]!;
    const l1 = t.history[index]!;
    if ((l0 - b) * (l1 - b) > 0 || l0 === l1) return fallback;
    const c0 = Math.log(t.centers[prev]!);
    const c1 = Math.log(t.centers[index]!);
    const c = c0 + ((l0 - b) / (l0 - l1)) * (c1 - c0);
    return Math.round(Math.exp(c));
  }

  private noise(levels: number[]): number {
    const o = this.o;
    if (levels.length < 6) return o.noiseDb;
    const diffs: number[] = [];
    for (let i = 1; i < levels.length; i++) diffs.push(Math.abs(levels[i]! - levels[i - 1]!));
    // MAD of differences: 1.4826·median|Δ|/√2 estimates the level's own standard deviation.
    return Math.max(o.minNoiseDb, (1.4826 * median(diffs)) / Math.SQRT2);
  }

  private networkChange(w: PhaseInput, layerChanges: PhaseChange[]): PhaseChange | null {
    let total = 0;
    const weight: Record<PhaseName, number> = { drift: 0, diffusion: 0, undetermined: 0 };
    for (const t of this.tracks.values()) {
      total += t.params;
      weight[t.phase] += t.params;
    }
    if (total === 0) return null;
    const share = this.o.networkShare;
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
