/**
 * Stop advice per window: `continue`, `may-stop` or `stop`, with the reason in a sentence that is true of
 * the numbers behind it.
 *
 * Policy (each number configurable; every rule is a rule of thumb, common practice, no source, except where
 * a source is named):
 * 1. Never advise stopping while the network or any layer drifts, or while a phase is still undetermined:
 *    the weights are still moving along the gradient.
 * 2. Once all have diffused, wait until the diffusion has lasted `diffusionRatio` times the drift before it
 *    (twice that for `stop`): the slow phase after the loss flattens often still improves generalisation.
 * 3. The watched quantity: validation accuracy when fit logs one (what a model is judged by; validation loss
 *    can rise from over-confidence while accuracy still improves), else `val_loss`, else the training loss.
 * 4. A trend test, not a patience count: least squares of the watched quantity against ln(step) over the
 *    last doubling of the training (the values logged after half the steps so far; at least `patience` of
 *    them), with the Student-t interval of the slope, as for any simple linear regression (methods.md §9).
 *    The slope times ln 2 is what the last doubling gained, and what the next one is expected to gain.
 *    `may-stop` when its one-sided 95 % upper bound is below `minGain` of what is left to gain (1 − accuracy,
 *    or the loss itself); `stop` when that has held for `patience` values in a row. Successive values are
 *    autocorrelated, so the interval is descriptive (methods.md §9), not a guarantee.
 * The advice is a statistical estimate, to be confirmed on held-out data before acting on it.
 */
import { checkOptions, type OptionSchema } from '../option-check.js';
import type { PhaseName, PhaseSnapshot } from './phase-detector.js';
import { studentTQuantile } from './student-t.js';

export type Verdict = 'continue' | 'may-stop' | 'stop';

export interface AdviceOptions {
  /**
   * Fewest values of the watched quantity in the trend test (at least 5), and how many in a row `may-stop`
   * must hold for `stop`. Default 10.
   */
  patience?: number;
  /**
   * The smallest gain from doubling the training that is worth having, as a share of what is left to gain:
   * of 1 − accuracy for an accuracy, of the value itself for a loss. Default 0.05 (at 90 % accuracy: 0.5 points).
   */
  minGain?: number;
  /** Diffusion must have lasted this many times the drift for `may-stop` (twice that for `stop`). Default 1. */
  diffusionRatio?: number;
  /** The logged quantity to watch; default the validation accuracy, else `val_loss`, else `loss`. */
  watch?: string;
}

export const ADVICE_DEFAULTS = Object.freeze({ patience: 10, minGain: 0.05, diffusionRatio: 1 });

/** Fewest values a trend test takes: the least `patience` may be. */
const MIN_VALUES = 5;

/** The range of each option; checked by the StopAdvisor, monitor() and `tidemark analyze` alike. */
export const ADVICE_RULES: OptionSchema = Object.freeze({
  patience: { type: 'number', integer: true, min: MIN_VALUES, max: 100_000 },
  minGain: { type: 'number', above: 0, below: 1 },
  diffusionRatio: { type: 'number', min: 0, max: 1000 },
  watch: { type: 'string', nonEmpty: true },
});

/** The trend of the watched quantity over its recent values. */
export interface AdviceTrend {
  /** Values in the fit. */
  values: number;
  /** Estimated gain from doubling the training (positive: better), in the quantity's units. */
  gain: number;
  /** One-sided 95 % upper bound of that gain. */
  gain_upper: number;
  /** The gain worth having: minGain × what is left to gain. */
  worth: number;
}

/**
 * Which rule decided the verdict: the reason's kind, stable while its numbers change. A new stage is worth a
 * marker (the page and `show` then give the reason that holds now), a new number within one is not.
 */
export type AdviceStage =
  | 'gradients-zero'
  | 'phase-unknown'
  | 'network-drift'
  | 'layers-drift'
  | 'layers-unknown'
  | 'short-diffusion'
  | 'watch-missing'
  | 'few-values'
  | 'still-gaining'
  | 'flat';

export interface Advice {
  step: number;
  verdict: Verdict;
  stage: AdviceStage;
  reason: string;
  /** The quantity watched, and its best value so far. */
  watched: string | null;
  best: number | null;
  /** Values of the watched quantity since the last improvement of its best. */
  stale_windows: number;
  /** The trend test over the last doubling of the training, once it holds `patience` values. */
  trend: AdviceTrend | null;
  /** Values in a row at which the trend test found no gain worth having. */
  flat_values: number;
}

/** Whether `next` is worth a marker after `previous`: the first advice, a new verdict, or a new stage. */
export function adviceChanged(previous: Advice | null, next: Advice): boolean {
  return previous === null || previous.verdict !== next.verdict || previous.stage !== next.stage;
}

/** The advices of a run worth a marker (adviceChanged), as the monitor records them online. */
export function adviceChanges(advices: readonly Advice[]): Advice[] {
  return advices.filter((a, i) => adviceChanged(i === 0 ? null : advices[i - 1]!, a));
}

/** The gradient sizes of a window's network or layer entry, to tell a network that no longer learns. */
export interface AdviceGradients {
  grad_mean_norm: number;
  grad_std_norm: number;
}

export interface AdviceInput {
  step: number;
  logs: Record<string, number>;
  /** The window's per-layer and network gradient sizes (a WindowRecord has them); optional for scripted input. */
  layers?: Record<string, AdviceGradients>;
  network?: AdviceGradients;
}

/** Exactly zero mean and spread: every minibatch gradient of the window was zero. */
function vanished(g: AdviceGradients | undefined): boolean {
  return g !== undefined && g.grad_mean_norm === 0 && g.grad_std_norm === 0;
}

/** The layers of a window whose every minibatch gradient was exactly zero, and whether the whole network's were. */
export function zeroGradients(w: AdviceInput): { network: boolean; layers: string[] } {
  const layers = Object.entries(w.layers ?? {}).filter(([, g]) => vanished(g)).map(([name]) => name);
  return { network: vanished(w.network), layers };
}

const ACCURACY_NAMES = ['val_acc', 'val_accuracy'];
/** Quantities where larger is better (accuracy, area under a curve, precision, recall, F1). */
const HIGHER_IS_BETTER = /acc|auc|precision|recall|f1/i;
const HISTORY = 4096;

/** Least squares of ys on ln(steps): gain per doubling and its one-sided 95 % upper bound. */
export function doublingGain(steps: readonly number[], ys: readonly number[], higherIsBetter: boolean): { gain: number; upper: number } | null {
  const n = steps.length;
  if (n < 3 || ys.length !== n) return null;
  const xs = steps.map((s) => Math.log(s));
  const mx = xs.reduce((a, b) => a + b, 0) / n;
  const my = ys.reduce((a, b) => a + b, 0) / n;
  let sxx = 0;
  let sxy = 0;
  for (let i = 0; i < n; i++) {
    sxx += (xs[i]! - mx) ** 2;
    sxy += (xs[i]! - mx) * (ys[i]! - my);
  }
  if (!(sxx > 0)) return null;
  const b = sxy / sxx;
  let sse = 0;
  for (let i = 0; i < n; i++) sse += (ys[i]! - my - b * (xs[i]! - mx)) ** 2;
  const se = Math.sqrt(sse / (n - 2) / sxx);
  const gain = (higherIsBetter ? b : -b) * Math.LN2;
  return { gain, upper: gain + studentTQuantile(0.95, n - 2) * se * Math.LN2 };
}

function plural(n: number, word: string): string {
  return `${n.toLocaleString('en-US')} ${word}${n === 1 ? '' : 's'}`;
}

function signed(x: number, digits: number): string {
  return `${x >= 0 ? '+' : '−'}${Math.abs(x).toPrecision(digits)}`;
}

export class StopAdvisor {
  private readonly o: Required<Omit<AdviceOptions, 'watch'>> & { watch: string | null };
  private best: number | null = null;
  private stale = 0;
  private watched: string | null = null;
  private driftStart: number | null = null;
  /** Step at which the last drift of the network ended (its diffusion-start), or null while none ended. */
  private driftEnd: number | null = null;
  private lastNetwork: PhaseName = 'undetermined';
  private steps: number[] = [];
  private values: number[] = [];
  private flat = 0;
  /** Every log name seen, for saying what exists when the watched one does not. */
  private readonly logged = new Set<string>();

  constructor(options: AdviceOptions = {}) {
    this.o = checkOptions(options, ADVICE_RULES, { ...ADVICE_DEFAULTS, watch: null } as never, { owner: 'StopAdvisor' }) as StopAdvisor['o'];
  }

  /**
   * Forgets the watched quantity's history, e.g. when a new fit starts: the user chose to train on, perhaps
   * on new data, so the trend starts over.
   */
  restart(): void {
    this.best = null;
    this.stale = 0;
    this.steps = [];
    this.values = [];
    this.flat = 0;
  }

  private chooseWatch(logs: Record<string, number>): string | null {
    if (this.o.watch !== null) return this.o.watch;
    // Once a validation quantity has been seen it stays watched: it arrives only in windows where an epoch ended.
    const acc = ACCURACY_NAMES.find((k) => logs[k] !== undefined);
    if (acc !== undefined) return acc;
    if (this.watched !== null && ACCURACY_NAMES.includes(this.watched)) return this.watched;
    if (logs.val_loss !== undefined || this.watched === 'val_loss') return 'val_loss';
    return logs.loss !== undefined ? 'loss' : this.watched;
  }

  update(w: AdviceInput, phase: PhaseSnapshot): Advice {
    const watch = this.chooseWatch(w.logs);
    if (watch !== this.watched) {
      this.watched = watch;
      this.restart();
    }
    // A new drift (new data, a new task) starts the clock again, and the old history no longer applies.
    if (phase.network === 'drift' && this.lastNetwork !== 'drift') {
      this.driftStart = phase.networkSince ?? w.step;
      this.driftEnd = null;
      this.restart();
    }
    if (phase.network === 'diffusion' && this.lastNetwork === 'drift') this.driftEnd = phase.networkSince;
    this.lastNetwork = phase.network;
    const higher = watch !== null && HIGHER_IS_BETTER.test(watch);
    const value = watch === null ? undefined : w.logs[watch];
    const p = this.o.patience;
    const fresh = value !== undefined && Number.isFinite(value);
    if (fresh) {
      this.steps.push(w.step);
      this.values.push(value);
      if (this.steps.length > HISTORY) {
        this.steps.shift();
        this.values.shift();
      }
      if (this.best === null || (higher ? value > this.best : value < this.best)) {
        this.best = value;
        this.stale = 0;
      } else this.stale++;
    }
    for (const k of Object.keys(w.logs)) this.logged.add(k);
    const trend = this.lastDoubling(w.step, p, higher);
    if (fresh) this.flat = trend !== null && trend.gain_upper < trend.worth ? this.flat + 1 : 0;
    const base = { step: w.step, watched: watch, best: this.best, stale_windows: this.stale, trend, flat_values: this.flat };
    const what = watch ?? 'the loss';
    const cont = (stage: AdviceStage, reason: string): Advice => ({ ...base, verdict: 'continue', stage, reason });

    const zero = zeroGradients(w);
    if (zero.network) {
      return cont(
        'gradients-zero',
        'Every gradient of this window was exactly zero: the network no longer learns (every unit dead, or a learning rate that broke it). Its phase cannot be told; lower the learning rate or start again from new weights.',
      );
    }
    const drifting = Object.entries(phase.layers).filter(([, ph]) => ph === 'drift').map(([l]) => l);
    // A layer whose gradients are all exactly zero has no phase and never will: it does not hold the advice.
    const unknown = Object.entries(phase.layers)
      .filter(([l, ph]) => ph === 'undetermined' && !zero.layers.includes(l))
      .map(([l]) => l);
    if (phase.network === 'drift') return cont('network-drift', 'The network is still drifting: its weights move more along the mean gradient than by minibatch noise, so training is making directed progress.');
    if (phase.network !== 'diffusion' || phase.networkSince === null) return cont('phase-unknown', 'Not enough windows yet to tell drift from diffusion.');
    if (drifting.length > 0) {
      return cont('layers-drift', `The network diffuses, but ${drifting.length === 1 ? `layer ${drifting[0]} still drifts` : `layers ${drifting.join(', ')} still drift`}: training is still making directed progress there.`);
    }
    if (unknown.length > 0) return cont('layers-unknown', `The network diffuses, but the phase of ${unknown.join(', ')} is not known yet.`);

    const diffusionSince = Math.max(phase.networkSince, ...Object.values(phase.since).map((s) => s ?? 0));
    const diffusionSteps = w.step - diffusionSince;
    const driftSteps = this.driftStart !== null && this.driftEnd !== null ? Math.max(0, this.driftEnd - this.driftStart) : null;
    const r = this.o.diffusionRatio;
    const phaseText =
      driftSteps === null
        ? `Every layer has diffused for ${plural(diffusionSteps, 'step')} (no drift phase was seen before)`
        : `Every layer has diffused for ${plural(diffusionSteps, 'step')} (the drift before lasted ${plural(driftSteps, 'step')})`;
    if (driftSteps !== null && diffusionSteps < r * driftSteps) {
      return cont('short-diffusion', `${phaseText}; diffusion this short often still improves generalisation: waiting for ${plural(Math.ceil(r * driftSteps), 'step')} of it.`);
    }
    if (trend === null && watch !== null && !this.logged.has(watch)) {
      const names = [...this.logged].sort();
      return cont(
        'watch-missing',
        `${phaseText}; '${watch}' has not appeared in the logs${names.length > 0 ? ` (logged: ${names.join(', ')})` : ''}, so its trend cannot be judged. Check the name given to watch.`,
      );
    }
    if (trend === null) {
      return cont('few-values', `${phaseText}; ${what} has ${plural(this.inLastDoubling(w.step), 'value')} in the last doubling of the training, fewer than the ${p} its trend test needs.`);
    }
    const units = (x: number): string => (higher && Math.abs(this.best ?? 0) <= 1 ? `${signed(100 * x, 2)} points` : signed(x, 2));
    const trendText =
      `over the last doubling of the training (${trend.values} values) ${what} changed at a rate of ${units(trend.gain)} per doubling, ` +
      `at most ${units(trend.gain_upper)} (95 % upper bound)`;
    if (trend.gain_upper >= trend.worth) return cont('still-gaining', `${phaseText}; ${trendText}: another doubling may still gain ${units(trend.worth)} or more.`);
    const longEnough = driftSteps === null || diffusionSteps >= 2 * r * driftSteps;
    const caution = 'An estimate: confirm on held-out data before stopping.';
    if (this.flat >= p && longEnough) {
      return { ...base, verdict: 'stop', stage: 'flat', reason: `${phaseText}; ${trendText}, below the ${units(trend.worth)} worth having, for ${plural(this.flat, 'value')} in a row. ${caution}` };
    }
    return { ...base, verdict: 'may-stop', stage: 'flat', reason: `${phaseText}; ${trendText}, below the ${units(trend.worth)} worth having. ${caution}` };
  }

  /** Values logged in the last doubling of the training (after step/2); they are the newest, so counted from the end. */
  private inLastDoubling(step: number): number {
    let first = this.steps.length;
    while (first > 0 && this.steps[first - 1]! > step / 2) first--;
    return this.steps.length - first;
  }

  /** The trend over the values of the last doubling of the training; null with fewer than n. */
  private lastDoubling(step: number, n: number, higher: boolean): AdviceTrend | null {
    const k = this.inLastDoubling(step);
    if (k < n) return null;
    const first = this.steps.length - k;
    const steps = this.steps.slice(first);
    const ys = this.values.slice(first);
    const fit = doublingGain(steps, ys, higher);
    if (fit === null) return null;
    const last = ys[ys.length - 1]!;
    const left = higher && last >= 0 && last <= 1 ? 1 - last : Math.abs(last);
    return { values: k, gain: fit.gain, gain_upper: fit.upper, worth: this.o.minGain * left };
  }
}

/** Advice for each window of a stored run, given the phase states detectPhases produced for them. */
export function adviseStop(windows: readonly AdviceInput[], states: readonly PhaseSnapshot[], options: AdviceOptions = {}): Advice[] {
  const a = new StopAdvisor(options);
  return windows.map((w, i) => a.update(w, states[i]!));
}
