/**
 * Stop advice per window: `continue`, `may-stop` or `stop`, with the reason in a sentence.
 *
 * Default policy (every number configurable): never advise stopping while the network drifts or its
 * phase is unknown; `may-stop` once it has been in diffusion for at least as many steps as its drift
 * lasted and the watched quantity (`val_loss` when logged, else `loss`) has not improved by a relative
 * 1e-3 over `patience` windows; `stop` once diffusion has lasted twice the drift and there was no such
 * improvement over twice the patience. These are rules of thumb (common practice, no source); the
 * advice is a statistical estimate, to be confirmed on held-out data before acting on it.
 */
import type { PhaseName, PhaseSnapshot } from './phase-detector.js';

export type Verdict = 'continue' | 'may-stop' | 'stop';

export interface AdviceOptions {
  /** Windows without improvement before `may-stop`; `stop` needs twice as many. Default 10. */
  patience?: number;
  /** Relative improvement that counts. Default 1e-3. */
  minRelativeImprovement?: number;
  /** Diffusion must have lasted this many times the drift for `may-stop` (twice that for `stop`). Default 1. */
  diffusionRatio?: number;
  /** The logged quantity to watch; default `val_loss` once it has been logged, else `loss`. */
  watch?: string;
}

export const ADVICE_DEFAULTS = Object.freeze({ patience: 10, minRelativeImprovement: 1e-3, diffusionRatio: 1 });

export interface Advice {
  step: number;
  verdict: Verdict;
  reason: string;
  /** The quantity watched, and its best value so far. */
  watched: string | null;
  best: number | null;
  /** Windows since the watched quantity last improved by the relative threshold. */
  stale_windows: number;
}

export interface AdviceInput {
  step: number;
  logs: Record<string, number>;
}

export class StopAdvisor {
  private readonly o: Required<Omit<AdviceOptions, 'watch'>> & { watch: string | null };
  private best: number | null = null;
  private stale = 0;
  private watched: string | null = null;
  private driftStart: number | null = null;
  private lastNetwork: PhaseName = 'undetermined';

  constructor(options: AdviceOptions = {}) {
    this.o = { ...ADVICE_DEFAULTS, watch: null, ...options } as StopAdvisor['o'];
  }

  /**
   * Forgets the best value and the count of windows without improvement, e.g. when a new fit starts:
   * the user chose to train on, perhaps on new data, so the patience starts over.
   */
  restart(): void {
    this.best = null;
    this.stale = 0;
  }

  update(w: AdviceInput, phase: PhaseSnapshot): Advice {
    // val_loss arrives only in windows where an epoch ended: once it has been seen it stays the watched
    // quantity, and windows without it neither improve nor age it.
    const watch =
      this.o.watch ??
      (w.logs.val_loss !== undefined || this.watched === 'val_loss' ? 'val_loss' : w.logs.loss !== undefined ? 'loss' : this.watched);
    if (watch !== this.watched) {
      // Switching to val_loss once validation appears restarts the count.
      this.watched = watch;
      this.best = null;
      this.stale = 0;
    }
    // A new drift (new data, a new task) starts the clock again, and the old best no longer applies.
    if (phase.network === 'drift' && this.lastNetwork !== 'drift') {
      this.driftStart = phase.networkSince ?? 0;
      this.best = null;
      this.stale = 0;
    }
    this.lastNetwork = phase.network;
    const value = watch === null ? undefined : w.logs[watch];
    if (value !== undefined && Number.isFinite(value)) {
      if (this.best === null || value < this.best - this.o.minRelativeImprovement * Math.abs(this.best)) {
        this.best = value;
        this.stale = 0;
      } else this.stale++;
    }
    const base = { step: w.step, watched: watch, best: this.best, stale_windows: this.stale };
    const net: PhaseName = phase.network;
    if (net !== 'diffusion' || phase.networkSince === null) {
      const reason =
        net === 'drift'
          ? 'The network is still drifting: its gradients agree from minibatch to minibatch, so training is making directed progress.'
          : 'Not enough windows yet to tell drift from diffusion.';
      return { ...base, verdict: 'continue', reason };
    }
    const driftSteps = Math.max(1, phase.networkSince - (this.driftStart ?? 0));
    const diffusionSteps = w.step - phase.networkSince;
    const p = this.o.patience;
    const r = this.o.diffusionRatio;
    const what = watch ?? 'the loss';
    if (diffusionSteps >= 2 * r * driftSteps && this.stale >= 2 * p) {
      return {
        ...base,
        verdict: 'stop',
        reason: `In diffusion for ${diffusionSteps} steps, over twice the ${driftSteps} steps of drift, and ${what} has not improved by ${this.o.minRelativeImprovement} (relative) in ${this.stale} windows. Confirm on held-out data before stopping.`,
      };
    }
    if (diffusionSteps >= r * driftSteps && this.stale >= p) {
      return {
        ...base,
        verdict: 'may-stop',
        reason: `In diffusion for ${diffusionSteps} steps, as long as the ${driftSteps} steps of drift, and ${what} has not improved in ${this.stale} windows; further gains are possible but slow. Confirm on held-out data before stopping.`,
      };
    }
    const reason =
      diffusionSteps < r * driftSteps
        ? `In diffusion for ${diffusionSteps} of the ${Math.ceil(r * driftSteps)} steps the drift lasted; this slow phase often still improves generalisation.`
        : `In diffusion long enough, but ${what} improved within the last ${p} windows.`;
    return { ...base, verdict: 'continue', reason };
  }
}

/** Advice for each window of a stored run, given the phase states detectPhases produced for them. */
export function adviseStop(windows: readonly AdviceInput[], states: readonly PhaseSnapshot[], options: AdviceOptions = {}): Advice[] {
  const a = new StopAdvisor(options);
  return windows.map((w, i) => a.update(w, states[i]!));
}
