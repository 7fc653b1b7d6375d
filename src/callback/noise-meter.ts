/**
 * The noise measurement: now and then, between two optimizer steps, the gradients of K disjoint groups
 * of training rows are computed at the current weights (nothing is updated), and their Gram matrix gives
 * the fixed-weight noise scale of every variable, layer and the network (analysis/fixed-weight-noise.ts).
 *
 * Why not from the training minibatches themselves: those are taken at moving weights, so their mean is
 * a path average and their spread holds the gradient's change along the path; on real training that
 * put the windowed estimate 4–28 times above the fixed-weight value (methods.md §10).
 *
 * Cost control: it runs when its time so far fits in `budget` of the training time (or every N windows),
 * it stops adding groups once every layer's |G|² is resolved to `targetError`, and the group size follows
 * the last estimate, so that the rows drawn are a few times the noise scale. It is synchronous, so no
 * optimizer step can run in between, even in a custom loop.
 */
import * as tf from '@tensorflow/tfjs';
import { addGrams, noiseFromGram, type FixedWeightNoise, type NoiseDesign } from '../analysis/fixed-weight-noise.js';
import { mulberry32 } from '../analysis/random.js';
import { TidemarkRangeError, TidemarkTypeError } from '../errors.js';
import { checkOptions, invalidOption, satisfies, type OptionSchema } from '../option-check.js';
import type { NoiseSample } from '../protocol/records.js';
import type { ModelView } from './model-layers.js';
import { TrainingRows, type RowSet } from './training-rows.js';

export interface NoiseOptions {
  /**
   * When to measure. `'auto'` (default): at the first window, then whenever the time spent measuring
   * stays within `budget` of the training time so far. A number N: every N windows, whatever it costs.
   */
  every?: number | 'auto';
  /** With `every: 'auto'`, the share of training wall time measurements may take, in (0, 1]. Default 0.01. */
  budget?: number;
  /** Fewest groups of a measurement (≥ 4). Default 8. */
  minGroups?: number;
  /** Most groups of a measurement. Default 32. */
  maxGroups?: number;
  /** A measurement stops adding groups once every layer's |G|² has this relative standard error. Default 0.15. */
  targetError?: number;
  /** Above this relative standard error of |G|² a noise scale is reported missing (null). Default 0.3. */
  maxError?: number;
  /** Largest memory for the kept group gradients, bytes (groups × parameters × 4); caps the groups. Default 128 MiB. */
  maxBytes?: number;
  /**
   * Training rows to draw from, `{ x, y }` like fit's (a sample of the training set, for fitDataset and
   * custom loops). Default: the x and y of the fit call in progress.
   */
  x?: tf.Tensor | tf.Tensor[];
  y?: tf.Tensor | tf.Tensor[];
}

export const NOISE_DEFAULTS = {
  every: 'auto',
  budget: 0.01,
  minGroups: 8,
  maxGroups: 32,
  targetError: 0.15,
  maxError: 0.3,
  maxBytes: 128 * 1024 * 1024,
} as const;

export type ResolvedNoiseOptions = Readonly<Omit<Required<NoiseOptions>, 'x' | 'y'>> & { readonly rows: { x: unknown; y: unknown } | null };

const NOISE_RULES: OptionSchema = Object.freeze({
  every: { type: 'any' },
  budget: { type: 'number', above: 0, max: 1 },
  minGroups: { type: 'number', integer: true, min: 4, max: 4096 },
  maxGroups: { type: 'number', integer: true, min: 4, max: 4096 },
  targetError: { type: 'number', above: 0, max: 10 },
  maxError: { type: 'number', above: 0, max: 10 },
  maxBytes: { type: 'number', integer: true, min: 1024 },
  x: { type: 'any' },
  y: { type: 'any' },
});

/** Checks the `noise` option; `false` turns measurements off (null). */
export function resolveNoiseOptions(value: unknown): ResolvedNoiseOptions | null {
  if (value === false) return null;
  if (value === true) value = undefined;
  const o = checkOptions<NoiseOptions>(value, NOISE_RULES, NOISE_DEFAULTS as NoiseOptions, { prefix: 'noise.' });
  const every = o.every ?? 'auto';
  if (every !== 'auto' && !satisfies({ type: 'number', integer: true, min: 1 }, every)) {
    throw invalidOption('every', { type: 'number', integer: true, min: 1 }, every, { prefix: 'noise.' });
  }
  const out = o as Required<NoiseOptions>;
  if (out.maxGroups < out.minGroups) {
    throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', `Option 'noise.maxGroups' must be at least noise.minGroups (${out.minGroups}); received ${out.maxGroups}.`);
  }
  if (out.maxError < out.targetError) {
    throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', `Option 'noise.maxError' must be at least noise.targetError (${out.targetError}); received ${out.maxError}.`);
  }
  if ((o.x === undefined) !== (o.y === undefined)) {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', "Option 'noise' needs both x and y (training rows and their targets), or neither.");
  }
  const { x, y, ...rest } = out;
  return Object.freeze({ ...rest, rows: x === undefined ? null : { x, y } }) as unknown as ResolvedNoiseOptions;
}

/** Values of one measurement, for window-stats: a Gram per tracked variable and the design. */
export interface NoiseGrams {
  design: NoiseDesign;
  /** One K×K Gram per tracked variable, in view order. */
  grams: Float64Array[];
}

export interface NoiseResult {
  sample: NoiseSample;
  grams: NoiseGrams | null;
}

type LossFn = (yTrue: tf.Tensor, yPred: tf.Tensor) => tf.Tensor;

interface TrainableModel {
  lossFunctions?: LossFn[];
  apply(inputs: tf.Tensor | tf.Tensor[], kwargs: Record<string, unknown>): tf.Tensor | tf.Tensor[] | unknown;
  calculateLosses?: () => tf.Scalar[];
  nonTrainableWeights?: { read(): tf.Variable; write(v: tf.Tensor): unknown }[];
}

/** Gradient groups smaller than this are all per-op overhead on the cpu backend. */
const MIN_GROUP_ROWS = 32;
const SEED = 0x7d1de;

export class NoiseMeter {
  readonly options: ResolvedNoiseOptions;
  readonly rows: TrainingRows;
  private readonly model: TrainableModel;
  private readonly view: ModelView;
  private readonly rng = mulberry32(SEED);
  /** The network's last estimate, which sizes the next measurement's groups. */
  private lastEstimate: number | null = null;
  private lastUnresolvedRows: number | null = null;
  readonly cost = { calls: 0, ms: 0 };

  constructor(model: unknown, view: ModelView, options: ResolvedNoiseOptions) {
    // A tf.Sequential compiles an inner LayersModel, which holds the loss functions.
    const inner = (model as { model?: TrainableModel }).model;
    this.model = (Array.isArray(inner?.lossFunctions) ? inner : model) as TrainableModel;
    this.view = view;
    this.options = options;
    if (!Array.isArray(this.model.lossFunctions) || this.model.lossFunctions.length === 0) {
      throw new TidemarkTypeError('TIDEMARK_ERR_MODEL_NOT_COMPILED', 'The model has no loss functions. Call model.compile({ optimizer, loss }) before monitor(model).');
    }
    this.rows = new TrainingRows(model, options.rows);
  }

  /** Whether a measurement is due at this window; `trainingMs` is the wall time since the first step. */
  due(windowIndex: number, trainingMs: number): boolean {
    const every = this.options.every;
    if (every !== 'auto') return windowIndex % every === 0;
    if (this.cost.calls === 0) return true;
    // The next one is expected to cost what the earlier ones did on average, so a measurement starts only when
    // it fits in the budget with it. The first also pays once for set-up (kernels, compiled code: 100-400 ms
    // measured) and takes only its minimum groups; pricing the second by it delays the second, but keeps a short
    // run within its budget (the second used to start before it fitted: 1.5 % on a 15 s run with a 1 % budget).
    const next = this.cost.ms / this.cost.calls;
    return this.cost.ms + next <= this.options.budget * trainingMs;
  }

  /** What a measurement may still spend now, ms (at least its minimum groups always run). */
  allowance(trainingMs: number): number {
    return this.options.every === 'auto' ? Math.max(0, this.options.budget * trainingMs - this.cost.ms) : Number.POSITIVE_INFINITY;
  }

  /**
   * Measures at the current weights. `batchSize` is the training batch size B (the smallest group);
   * never throws for lack of rows, only for a failing model (the monitor reports it).
   */
  measure(batchSize: number | null, allowanceMs: number): NoiseResult {
    const rows = this.rows.current();
    if (rows === null) return { sample: skipped('unavailable', this.rows.missingReason()), grams: null };
    const started = performance.now();
    const groupRows = this.groupRows(batchSize, rows);
    const maxByRows = Math.floor(rows.count / groupRows);
    const params = this.view.variables.reduce((a, v) => a + v.size, 0);
    const maxByBytes = Math.floor(this.options.maxBytes / (4 * params));
    const maxGroups = Math.min(this.options.maxGroups, maxByRows, maxByBytes);
    if (maxGroups < 3) {
      const why =
        maxByBytes < 3
          ? `the model's ${params} parameters need more than noise.maxBytes (${this.options.maxBytes}) for 3 group gradients`
          : `${rows.count} training rows are too few for 3 groups of ${groupRows}`;
      return { sample: skipped('unavailable', why), grams: null };
    }
    const order = this.drawOrder(rows.count, maxGroups * groupRows);
    const vars = this.view.variables;
    const kept: Float32Array[][] = vars.map(() => []);
    const grams = vars.map(() => new Float64Array(maxGroups * maxGroups));
    let k = 0;
    let estimates: FixedWeightNoise[] = [];
    const restore = this.saveState();
    // The first measurement (auto) takes only its minimum groups: its one-time set-up makes it slow.
    const stopAfter = this.cost.calls === 0 && this.options.every === 'auto' ? 0 : allowanceMs;
    try {
      for (; k < maxGroups; k++) {
        const idx = order.subarray(k * groupRows, (k + 1) * groupRows);
        const grads = this.groupGradients(rows, idx);
        for (let v = 0; v < vars.length; v++) {
          const g = grads[v]!;
          const list = kept[v]!;
          const gram = grams[v]!;
          // The group's own dot product first: it is finite exactly when every value of g is.
          for (let j = k; j >= 0; j--) {
            const h = j === k ? g : list[j]!;
            let dot = 0;
            for (let i = 0; i < g.length; i++) dot += g[i]! * h[i]!;
            if (j === k && !Number.isFinite(dot)) {
              return { sample: { ...skipped('failed', `non-finite gradient values in group ${k + 1}`), ms: performance.now() - started }, grams: null };
            }
            gram[k * maxGroups + j] = dot;
            gram[j * maxGroups + k] = dot;
          }
          list.push(g);
        }
        const groups = k + 1;
        if (groups < this.options.minGroups) continue;
        estimates = this.estimateAll(grams, maxGroups, groups, groupRows, rows.population);
        const worst = Math.max(...estimates.map((e) => e.grad_sq_rse));
        if (worst <= this.options.targetError) {
          k++;
          break;
        }
        if (performance.now() - started > stopAfter) {
          k++;
          break;
        }
      }
    } finally {
      restore();
    }
    const groups = Math.min(k, maxGroups);
    if (estimates.length === 0) estimates = this.estimateAll(grams, maxGroups, groups, groupRows, rows.population);
    const ms = performance.now() - started;
    this.cost.calls++;
    this.cost.ms += ms;
    const design: NoiseDesign = { groups, groupRows, population: rows.population };
    const net = estimates[estimates.length - 1]!;
    if (net.resolved && net.noise_scale !== null) {
      this.lastEstimate = net.noise_scale;
      this.lastUnresolvedRows = null;
    } else {
      this.lastUnresolvedRows = groups * groupRows;
    }
    const compact = grams.map((g) => shrink(g, maxGroups, groups));
    const layersUnresolved = this.view.layers.filter((_, i) => !estimates[i]!.resolved).map((l) => l.name);
    const sample: NoiseSample = {
      status: net.resolved ? 'measured' : 'unresolved',
      reason: net.resolved
        ? layersUnresolved.length > 0
          ? `|G|² of ${layersUnresolved.join(', ')} not resolved from noise within ${groups} groups of ${groupRows} rows (their noise_scale is null)`
          : null
        : `the mean gradient is lost in the minibatch noise (|G|² of the network not resolved within ${groups} groups of ${groupRows} rows: ` +
          `relative error ${fmt(net.grad_sq_rse)}, needs ≤ ${this.options.maxError}); the noise scale is above about ${Number.isFinite(net.noise_scale_low) ? Math.round(net.noise_scale_low).toLocaleString('en-US') : '?'} examples`,
      groups,
      group_rows: groupRows,
      rows: groups * groupRows,
      population: rows.population,
      ms,
      noise_scale_low: Number.isFinite(net.noise_scale_low) && net.noise_scale_low > 0 ? net.noise_scale_low : null,
    };
    return { sample, grams: { design, grams: compact } };
  }

  dispose(): void {
    this.rows.dispose();
  }

  /** Per layer, then the network last, from the variables' Grams of the first `groups` groups. */
  private estimateAll(grams: Float64Array[], stride: number, groups: number, groupRows: number, population: number | null): FixedWeightNoise[] {
    const design = { groups, groupRows, population };
    const small = grams.map((g) => shrink(g, stride, groups));
    const out: FixedWeightNoise[] = [];
    for (const layer of this.view.layers) {
      out.push(noiseFromGram(addGrams(layer.variables.map((v) => small[v.index]!), groups), design, this.options.maxError));
    }
    out.push(noiseFromGram(addGrams(small, groups), design, this.options.maxError));
    return out;
  }

  /**
   * Rows per group: the training batch size at first; then about a quarter of the last estimate, so that
   * 16 groups hold about four noise scales of rows (the noise part of ‖m‖² is then a quarter of |G|²),
   * doubled after an unresolved measurement; at most what lets `minGroups` groups fit in the rows.
   */
  private groupRows(batchSize: number | null, rows: RowSet): number {
    const base = Math.max(MIN_GROUP_ROWS, Math.round(batchSize ?? MIN_GROUP_ROWS));
    let want = base;
    if (this.lastUnresolvedRows !== null) want = Math.max(base, Math.ceil((2 * this.lastUnresolvedRows) / 16));
    else if (this.lastEstimate !== null) want = Math.max(base, Math.ceil(this.lastEstimate / 4));
    const cap = Math.max(1, Math.floor(rows.count / this.options.minGroups));
    return Math.max(1, Math.min(want, cap));
  }

  /** A seeded partial Fisher–Yates shuffle: the first `need` of a random permutation of 0..count-1. */
  private drawOrder(count: number, need: number): Int32Array {
    const perm = new Int32Array(count);
    for (let i = 0; i < count; i++) perm[i] = i;
    for (let i = 0; i < need; i++) {
      const j = i + Math.floor(this.rng() * (count - i));
      const t = perm[i]!;
      perm[i] = perm[j]!;
      perm[j] = t;
    }
    return perm.subarray(0, need);
  }

  /** One group's gradient of the model's training loss, per tracked variable, read back as float32. */
  private groupGradients(rows: RowSet, idx: Int32Array): Float32Array[] {
    const model = this.model;
    const lossFns = model.lossFunctions!;
    const variables = this.view.variables.map((v) => v.variable);
    const grads = tf.tidy(() => {
      const index = tf.tensor1d(idx, 'int32');
      const xs = rows.xs.map((t) => tf.gather(t, index));
      const ys = rows.ys.map((t) => tf.gather(t, index));
      // The loss fit minimises (tfjs-layers makeTrainFunction): per-row losses summed over outputs,
      // averaged over rows, plus the regularisers' penalties. Sample and class weights are not applied.
      const f = (): tf.Scalar => {
        const out = model.apply(xs.length === 1 ? xs[0]! : xs, { training: true });
        const outs = (Array.isArray(out) ? out : [out]) as tf.Tensor[];
        let total: tf.Tensor | null = null;
        for (let i = 0; i < lossFns.length; i++) {
          const l = lossFns[i]!(ys[i]!, outs[i]!);
          total = total === null ? l : tf.add(total, l);
        }
        let loss = tf.mean(total!) as tf.Scalar;
        for (const r of model.calculateLosses?.() ?? []) loss = tf.add(loss, r);
        return loss;
      };
      const { grads: g } = tf.variableGrads(f, variables);
      return variables.map((v) => g[v.name] ?? tf.zerosLike(v));
    });
    try {
      return grads.map((g) => g.dataSync() as Float32Array);
    } finally {
      tf.dispose(grads);
    }
  }

  /**
   * Keeps what a measurement must not change: non-trainable weights (batch normalisation's moving
   * statistics, which a training-mode call updates) and Math.random, which dropout draws from and fit
   * shuffles with, so that training is the same with or without measurements.
   */
  private saveState(): () => void {
    const weights = this.model.nonTrainableWeights ?? [];
    const saved = weights.map((w) => tf.keep(w.read().clone()));
    const random = Math.random;
    const own = mulberry32(Math.floor(this.rng() * 2 ** 32));
    Math.random = own;
    return () => {
      Math.random = random;
      weights.forEach((w, i) => w.write(saved[i]!));
      tf.dispose(saved);
    };
  }
}

function skipped(status: NoiseSample['status'], reason: string): NoiseSample {
  return { status, reason, groups: 0, group_rows: 0, rows: 0, population: null, ms: 0, noise_scale_low: null };
}

/** The top-left k×k block of a stride×stride matrix. */
function shrink(gram: Float64Array, stride: number, k: number): Float64Array {
  if (stride === k) return gram;
  const out = new Float64Array(k * k);
  for (let i = 0; i < k; i++) for (let j = 0; j < k; j++) out[i * k + j] = gram[i * stride + j]!;
  return out;
}

function fmt(x: number): string {
  return Number.isFinite(x) ? x.toFixed(2) : String(x);
}
