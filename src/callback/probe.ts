/**
 * The activation probe: every few windows, one predict call on a multi-output view of the model reads
 * each tracked layer's activations on a fixed probe set, and turns them into activation health and
 * information estimates (binned I(X;T), I(T;Y); pairwise bounds on I(X;T) for the layer plus Gaussian
 * noise; a linear read-out's lower bound on I(T;Y)). It runs between windows, after the optimizer step has returned, never inside the tap.
 */
import * as tf from '@tensorflow/tfjs';
import { binnedInformation } from '../analysis/binned-information.js';
import { labelClasses, type LabelKind } from '../analysis/label-bins.js';
import { LINEAR_PROBE_DEFAULTS, linearProbeInformation } from '../analysis/linear-probe-information.js';
import { DEFAULT_NOISE_RATIO, pairwiseInformationBounds } from '../analysis/pairwise-information.js';
import { mulberry32 } from '../analysis/random.js';
import { TidemarkError, TidemarkRangeError, TidemarkTypeError } from '../errors.js';
import { unknownOption } from '../option-check.js';
import type { ModelView } from './model-layers.js';

export interface ProbeOptions {
  /** Probe inputs, `[rows, ...inputShape]` (an array of tensors for a model with several inputs). Required. */
  x: tf.Tensor | tf.Tensor[];
  /** Probe targets, one per row: one-hot `[rows, classes]`, class indices `[rows]`, or regression values. Required. */
  y: tf.Tensor | ArrayLike<number>;
  /**
   * When to probe. `'auto'` (default): at the first window, then whenever the time spent probing stays
   * within `budget` of the training time so far. A number N: every N windows (the first included),
   * whatever it costs.
   */
  every?: number | 'auto';
  /** With `every: 'auto'`, the share of training wall time the probe may take, in (0, 1]. Default 0.03. */
  budget?: number;
  /**
   * Rows used at most; a larger probe set is subsampled once, with a fixed seed. Default 2048: the forward pass
   * over the rows is most of a probe's cost, and the pairwise bounds and the linear read-out use at most 512 of
   * them anyway; the binned estimate's cap is then log2 2048 = 11 bits.
   */
  size?: number;
  /** Equal-width bins per unit of the binned estimate. Default 30. */
  bins?: number;
  /**
   * σ² of the pairwise bounds' Gaussian noise as a share of each layer's spread (the total variance of its
   * activations on the probe rows), > 0. Default 0.2: then wide layers stay below log2(rows) and the values
   * do not change when a layer's activations are rescaled (analysis/pairwise-information.ts).
   */
  noiseRatio?: number;
  /** An absolute σ², the same for every layer, in place of `noiseRatio` (giving both is an error). No default. */
  noiseVariance?: number;
  /** Rows entering the O(rows²·units) pairwise bounds (subsampled with a fixed seed); 0 turns the bounds off. Default 512. */
  boundRows?: number;
  /**
   * Rows entering the linear read-out's lower bound on I(T;Y) (a softmax regression per layer, cross-fitted on
   * two halves; subsampled with a fixed seed); 0 turns it off. Default 512.
   */
  linearRows?: number;
  /** How to read `y`: 'auto' (default), 'onehot', 'sparse' or 'regression'. */
  labels?: 'auto' | LabelKind;
  /** Quantile bins for regression targets. Default 10. */
  labelBins?: number;
  /** Largest activation read-back allowed per probe, bytes (rows × units of all layers × 4). Default 256 MiB. */
  maxBytes?: number;
}

export const PROBE_DEFAULTS = {
  every: 'auto',
  budget: 0.03,
  size: 2048,
  bins: 30,
  noiseRatio: DEFAULT_NOISE_RATIO,
  noiseVariance: null,
  boundRows: 512,
  linearRows: 512,
  labels: 'auto',
  labelBins: 10,
  maxBytes: 256 * 1024 * 1024,
} as const;

/** Exactly one of noiseRatio and noiseVariance is a number. */
export type ResolvedProbeOptions = Readonly<Required<Omit<ProbeOptions, 'noiseRatio' | 'noiseVariance'>>> & {
  readonly noiseRatio: number | null;
  readonly noiseVariance: number | null;
};

const NUMBERS = ['every', 'budget', 'size', 'bins', 'noiseRatio', 'noiseVariance', 'boundRows', 'linearRows', 'labelBins', 'maxBytes'] as const;
const REALS: readonly string[] = ['noiseRatio', 'noiseVariance'];
export const PROBE_OPTION_NAMES = ['x', 'y', 'labels', ...NUMBERS] as const;

const invalid = (message: string): TidemarkRangeError => new TidemarkRangeError('TIDEMARK_ERR_PROBE_INVALID', message);

/** Checks the probe's settings (not yet its tensors, which need the model). */
export function resolveProbeOptions(value: unknown): ResolvedProbeOptions | null {
  if (value === undefined || value === null || value === false) return null;
  if (typeof value !== 'object' || Array.isArray(value)) {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', "Option 'probe' must be an object { x, y, every, ... }.");
  }
  const o = value as Record<string, unknown>;
  for (const k of Object.keys(o)) {
    if (!(PROBE_OPTION_NAMES as readonly string[]).includes(k)) throw unknownOption(k, PROBE_OPTION_NAMES, { prefix: 'probe.' });
  }
  if (o.x === undefined || o.y === undefined) {
    throw new TidemarkTypeError('TIDEMARK_ERR_PROBE_INVALID', "Option 'probe' needs x (probe inputs) and y (their targets).");
  }
  const out: Record<string, unknown> = { ...PROBE_DEFAULTS, x: o.x, y: o.y };
  for (const k of NUMBERS) {
    const v = o[k];
    if (v === undefined || (k === 'every' && v === 'auto')) continue;
    if (k === 'budget') {
      if (typeof v !== 'number' || !(v > 0 && v <= 1)) {
        throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', `Option 'probe.budget' must be a share of training time in (0, 1], e.g. 0.03; received ${JSON.stringify(v)}.`);
      }
      out[k] = v;
      continue;
    }
    const real = REALS.includes(k);
    const min = k === 'boundRows' || k === 'linearRows' || real ? 0 : k === 'every' ? 1 : 2;
    if (typeof v !== 'number' || !Number.isFinite(v) || (!real && !Number.isInteger(v)) || v < min || (real && v <= 0)) {
      throw new TidemarkRangeError(
        'TIDEMARK_ERR_OPTION_INVALID',
        `Option 'probe.${k}' must be ${real ? 'a number > 0' : `an integer ≥ ${min}`}${k === 'every' ? " or 'auto'" : ''}; received ${JSON.stringify(v)}.`,
      );
    }
    out[k] = v;
  }
  if (o.noiseVariance !== undefined) {
    if (o.noiseRatio !== undefined) {
      throw new TidemarkTypeError(
        'TIDEMARK_ERR_OPTION_INVALID',
        "Options 'probe.noiseRatio' and 'probe.noiseVariance' were both given; pass one: noiseRatio for σ² as a share of each layer's spread, or noiseVariance for one absolute σ².",
      );
    }
    out.noiseRatio = null;
  }
  if (o.labels !== undefined) {
    if (!['auto', 'onehot', 'sparse', 'regression'].includes(o.labels as string)) {
      throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `Option 'probe.labels' must be 'auto', 'onehot', 'sparse' or 'regression'; received ${JSON.stringify(o.labels)}.`);
    }
    out.labels = o.labels;
  }
  return Object.freeze(out) as unknown as ResolvedProbeOptions;
}

/** How a layer's activation function bounds its output, which decides the binning range and saturation. */
export type ActivationKind = 'bounded' | 'relu' | 'unbounded';

export interface ProbedLayer {
  name: string;
  activation: string;
  kind: ActivationKind;
  /** Fixed binning range for bounded activations, else null (the data's min..max). */
  range: [number, number] | null;
  /** Values per row (the product of the output shape without the batch dimension). */
  units: number;
}

/** Per-layer values of one probe, as they go into the window record. */
export interface ProbeLayerValues {
  act_mean: number;
  act_std: number;
  /** Absent for activations with no limit (linear, elu, …). */
  act_saturation?: number;
  mi_input: number;
  mi_label: number;
  /** 1 when H(T) is within 0.1 bit of log2(rows): the binned values then say nothing. */
  mi_saturated: number;
  mi_input_upper?: number;
  mi_input_lower?: number;
  mi_label_pairwise?: number;
  /** 1 when the lower bound is within 0.1 bit of log2(rows used). */
  mi_bounds_saturated?: number;
  /** σ² of the noise the pairwise values assume (noiseRatio × the layer's total variance, or noiseVariance). */
  mi_noise_variance?: number;
  /** Lower bound on I(T;Y) from a cross-fitted linear read-out (Barber & Agakov 2003), bits; absent with linearRows 0. */
  mi_label_linear?: number;
  /** Held-out accuracy of that linear read-out. */
  linear_accuracy?: number;
  /** Rows that entered the binned estimate (rows with a NaN or infinite activation are left out). */
  probe_rows: number;
}

export interface ProbeResult {
  layers: Record<string, ProbeLayerValues>;
  /** Rows dropped for non-finite activations, per layer, when any were. */
  dropped: Record<string, number>;
  /** Time the probe took (forward pass and estimates), ms. */
  ms: number;
  /** Where that time went, ms: the forward pass with the read-back, the binned estimates, the pairwise bounds, the linear read-outs. */
  timing: { forward: number; binned: number; bounds: number; linear: number };
}

const BOUNDED: Record<string, [number, number]> = {
  tanh: [-1, 1],
  softsign: [-1, 1],
  sigmoid: [0, 1],
  hardSigmoid: [0, 1],
  softmax: [0, 1],
};
const RELU_LIKE = new Set(['relu', 'relu6']);

export function activationOf(name: string): { kind: ActivationKind; range: [number, number] | null } {
  const range = BOUNDED[name];
  if (range !== undefined) return { kind: 'bounded', range };
  if (RELU_LIKE.has(name)) return { kind: 'relu', range: null };
  return { kind: 'unbounded', range: null };
}

/**
 * Fraction of values at a limit. Bounded: within 1% of the range's width of either end (|a| ≥ 0.98 for
 * tanh, a ≤ 0.01 or ≥ 0.99 for sigmoid). ReLU-like: exactly zero (a dead or inactive unit), where the
 * gradient is zero too. Non-finite values are not counted. Returns null when the activation has no limit.
 */
export function saturationFraction(values: ArrayLike<number>, kind: ActivationKind, range: [number, number] | null): number | null {
  if (kind === 'unbounded') return null;
  let at = 0;
  let n = 0;
  if (kind === 'relu') {
    for (let i = 0; i < values.length; i++) {
      const v = values[i] as number;
      if (!Number.isFinite(v)) continue;
      n++;
      if (v === 0) at++;
    }
  } else {
    const [lo, hi] = range as [number, number];
    const margin = 0.01 * (hi - lo);
    for (let i = 0; i < values.length; i++) {
      const v = values[i] as number;
      if (!Number.isFinite(v)) continue;
      n++;
      if (v <= lo + margin || v >= hi - margin) at++;
    }
  }
  return n === 0 ? Number.NaN : at / n;
}

/** Mean and population standard deviation of the finite values (two passes, for precision). */
export function finiteMeanStd(values: ArrayLike<number>): { mean: number; std: number } {
  let n = 0;
  let sum = 0;
  for (let i = 0; i < values.length; i++) {
    const v = values[i] as number;
    if (Number.isFinite(v)) {
      n++;
      sum += v;
    }
  }
  if (n === 0) return { mean: Number.NaN, std: Number.NaN };
  const mean = sum / n;
  let ss = 0;
  for (let i = 0; i < values.length; i++) {
    const v = values[i] as number;
    if (Number.isFinite(v)) ss += (v - mean) * (v - mean);
  }
  return { mean, std: Math.sqrt(ss / n) };
}

interface LayerObject {
  name: string;
  output: unknown;
  outputShape: unknown;
  getConfig(): Record<string, unknown>;
  layers?: LayerObject[];
}

function flatten(layers: LayerObject[], out: Map<string, LayerObject>): Map<string, LayerObject> {
  for (const l of layers) {
    if (Array.isArray(l.layers)) flatten(l.layers, out);
    else out.set(l.name, l);
  }
  return out;
}

function shapeOf(t: tf.Tensor | ArrayLike<number>): number[] {
  return t instanceof tf.Tensor ? t.shape.slice() : [t.length];
}

function isTensor(v: unknown): v is tf.Tensor {
  return v instanceof tf.Tensor;
}

/**
 * The probe for one monitored model. Built at monitor(): everything that can be checked then (shapes,
 * rows, labels, the memory the read-back needs) is checked then, with coded errors.
 */
export class Probe {
  readonly options: ResolvedProbeOptions;
  readonly layers: ProbedLayer[];
  /** Layers the probe could not reach (e.g. inside a nested model), with the reason. */
  readonly skipped: { name: string; reason: string }[] = [];
  readonly rows: number;
  readonly labelKind: LabelKind;
  readonly labelCount: number;
  private readonly classes: Int32Array;
  private readonly xs: tf.Tensor[];
  private readonly probeModel: tf.LayersModel;
  private disposed = false;
  private calls = 0;
  private spentMs = 0;
  private lastMs = 0;

  constructor(model: tf.LayersModel, tracked: ModelView, options: ResolvedProbeOptions) {
    this.options = options;
    const xsIn = Array.isArray(options.x) ? options.x : [options.x];
    if (xsIn.length === 0 || !xsIn.every(isTensor)) {
      throw new TidemarkTypeError('TIDEMARK_ERR_PROBE_INVALID', "probe.x must be a tf.Tensor (or an array of them, one per model input).");
    }
    if (xsIn.some((t) => t.isDisposed)) throw new TidemarkTypeError('TIDEMARK_ERR_PROBE_INVALID', 'probe.x has been disposed; keep it until mon.close().');
    const inputs = model.inputs;
    if (xsIn.length !== inputs.length) {
      throw invalid(`probe.x has ${xsIn.length} tensor(s) but the model has ${inputs.length} input(s); pass one tensor per input.`);
    }
    const rows = xsIn[0]!.shape[0] ?? 0;
    xsIn.forEach((t, i) => {
      const want = inputs[i]!.shape;
      const fits = t.shape.length === want.length && want.every((d, j) => j === 0 || d === null || d === t.shape[j]);
      if (!fits) {
        throw invalid(`probe.x${xsIn.length > 1 ? `[${i}]` : ''} has shape [${t.shape.join(', ')}] but the model's input ${i} takes [${want.map((d) => d ?? 'rows').join(', ')}].`);
      }
      if (t.shape[0] !== rows) throw invalid(`probe.x tensors have different row counts (${rows} and ${t.shape[0]}); give every input the same rows.`);
    });
    if (rows < 2) throw invalid(`probe.x has ${rows} row(s); the estimates need at least 2 (a few hundred or more to mean much).`);

    const y = options.y;
    if (!isTensor(y) && !(Array.isArray(y) || ArrayBuffer.isView(y))) {
      throw new TidemarkTypeError('TIDEMARK_ERR_PROBE_INVALID', 'probe.y must be a tf.Tensor or an array of numbers, one target per probe row.');
    }
    if (isTensor(y) && y.isDisposed) throw new TidemarkTypeError('TIDEMARK_ERR_PROBE_INVALID', 'probe.y has been disposed; keep it until monitor() returns.');
    const yShape = shapeOf(y);
    if (yShape[0] !== rows) {
      throw invalid(`probe.y has ${yShape[0]} rows but probe.x has ${rows}; pass one target per probe row.`);
    }
    const cols = yShape.slice(1).reduce((a, b) => a * b, 1);
    const yValues: ArrayLike<number> = isTensor(y) ? (y.dataSync() as ArrayLike<number>) : (y as ArrayLike<number>);
    let labels;
    try {
      labels = labelClasses(yValues, [rows, cols], { kind: options.labels, bins: options.labelBins });
    } catch (e) {
      throw invalid(`probe.y: ${(e as Error).message}`);
    }
    this.labelKind = labels.kind;
    this.labelCount = labels.count;

    // Subsample once, so every probe reads the same rows.
    let pick: number[] | null = null;
    if (rows > options.size) {
      const rng = mulberry32(0x70be);
      const idx = Array.from({ length: rows }, (_, i) => i);
      for (let i = 0; i < options.size; i++) {
        const j = i + Math.floor(rng() * (rows - i));
        [idx[i], idx[j]] = [idx[j]!, idx[i]!];
      }
      pick = idx.slice(0, options.size).sort((a, b) => a - b);
    }
    this.rows = pick === null ? rows : pick.length;
    this.classes = pick === null ? labels.classes : Int32Array.from(pick, (i) => labels.classes[i]!);

    // A multi-output view: one forward pass gives every tracked layer's output.
    const byName = flatten((model as unknown as { layers: LayerObject[] }).layers, new Map());
    const reachable: { layer: LayerObject; output: tf.SymbolicTensor }[] = [];
    for (const t of tracked.layers) {
      const layer = byName.get(t.name);
      if (layer === undefined) continue;
      try {
        const output = layer.output as tf.SymbolicTensor | tf.SymbolicTensor[];
        if (Array.isArray(output)) throw new Error('the layer has several outputs');
        // Throws when the output is not connected to the model's inputs (a layer inside a nested model).
        tf.model({ inputs: model.inputs, outputs: output });
        reachable.push({ layer, output });
      } catch (e) {
        this.skipped.push({ name: t.name, reason: (e as Error).message });
      }
    }
    if (reachable.length === 0) {
      throw invalid(`no layer's output can be reached from the model's inputs (${this.skipped.map((s) => `${s.name}: ${s.reason}`).join('; ')}).`);
    }
    this.probeModel = tf.model({ inputs: model.inputs, outputs: reachable.map((r) => r.output) });
    this.layers = reachable.map(({ layer, output }) => {
      const config = layer.getConfig();
      const activation = typeof config.activation === 'string' ? config.activation : 'linear';
      const units = output.shape.slice(1).reduce((a: number, b) => a * (b ?? 1), 1);
      return { name: layer.name, activation, ...activationOf(activation), units };
    });
    const bytes = this.rows * this.layers.reduce((s, l) => s + l.units, 0) * 4;
    if (bytes > options.maxBytes) {
      throw invalid(
        `the probe would read ${(bytes / 2 ** 20).toFixed(1)} MiB of activations (${this.rows} rows × ${this.layers.reduce((s, l) => s + l.units, 0)} units × 4 bytes), ` +
          `over probe.maxBytes = ${(options.maxBytes / 2 ** 20).toFixed(1)} MiB; lower probe.size or raise probe.maxBytes.`,
      );
    }
    this.xs = xsIn.map((t) => (pick === null ? tf.clone(t) : tf.gather(t, pick)));
  }

  /**
   * Whether the window with this index (from 0) gets a probe, `trainingMs` into training. Under the
   * budget the next probe waits until its expected cost (the last one's) fits in the allowed share.
   */
  due(windowIndex: number, trainingMs: number): boolean {
    const every = this.options.every;
    if (every !== 'auto') return windowIndex % every === 0;
    if (this.calls === 0) return true;
    return this.spentMs + this.lastMs <= this.options.budget * trainingMs;
  }

  /** Probes run so far and the time they took, ms. */
  get cost(): { calls: number; ms: number } {
    return { calls: this.calls, ms: this.spentMs };
  }

  /** What the run's config records about the probe: every value's estimator and settings. */
  describe(): Record<string, unknown> {
    const o = this.options;
    return {
      rows: this.rows,
      every: o.every,
      ...(o.every === 'auto' ? { budget: o.budget } : {}),
      labels: { kind: this.labelKind, classes: this.labelCount, ...(this.labelKind === 'regression' ? { bins: o.labelBins } : {}) },
      binned: { estimator: 'binned-plugin', bins: o.bins, saturation_margin_bits: 0.1 },
      bounds:
        o.boundRows > 0
          ? {
              estimator: 'pairwise-kolchinsky-tracey',
              // σ² = noise_ratio × each layer's total variance (its mi_noise_variance per window), or one absolute noise_variance.
              noise_ratio: o.noiseRatio,
              noise_variance: o.noiseVariance,
              rows: Math.min(o.boundRows, this.rows),
            }
          : null,
      linear:
        o.linearRows > 0
          ? { estimator: 'linear-probe-barber-agakov', rows: Math.min(o.linearRows, this.rows), folds: LINEAR_PROBE_DEFAULTS.folds, l2: '1/fitting rows' }
          : null,
      layers: Object.fromEntries(this.layers.map((l) => [l.name, { activation: l.activation, range: l.range, units: l.units }])),
      skipped: this.skipped,
    };
  }

  /**
   * One uncounted pass before training: the first forward pass and estimates of a shape pay one-time
   * costs (kernel set-up, JIT) several times a probe's steady cost, which would otherwise make the time
   * budget wait far too long for the second probe.
   */
  async warmUp(): Promise<void> {
    await this.measure();
    this.calls = 0;
    this.spentMs = 0;
    this.lastMs = 0;
  }

  /** Runs the probe set through the model and computes every layer's values. */
  async measure(): Promise<ProbeResult> {
    if (this.disposed) throw new TidemarkError('TIDEMARK_ERR_MONITOR_CLOSED', 'The probe was used after close().');
    const started = performance.now();
    const outs = tf.tidy(() => {
      const r = this.probeModel.predict(this.xs.length === 1 ? this.xs[0]! : this.xs, { batchSize: 512 });
      return Array.isArray(r) ? r : [r];
    });
    const timing = { forward: 0, binned: 0, bounds: 0, linear: 0 };
    const result: ProbeResult = { layers: {}, dropped: {}, ms: 0, timing };
    try {
      const acts = await Promise.all(outs.map(async (o) => (await o.data()) as Float32Array));
      timing.forward = performance.now() - started;
      for (let i = 0; i < this.layers.length; i++) {
        const layer = this.layers[i]!;
        const values = this.layerValues(layer, acts[i]!, timing);
        result.layers[layer.name] = values;
        if (values.probe_rows < this.rows) result.dropped[layer.name] = this.rows - values.probe_rows;
      }
    } finally {
      tf.dispose(outs);
    }
    result.ms = performance.now() - started;
    this.calls++;
    this.spentMs += result.ms;
    this.lastMs = result.ms;
    return result;
  }

  private layerValues(layer: ProbedLayer, acts: Float32Array, timing: ProbeResult['timing']): ProbeLayerValues {
    const o = this.options;
    const t0 = performance.now();
    const shape: [number, number] = [this.rows, layer.units];
    const { mean, std } = finiteMeanStd(acts);
    const binned = binnedInformation(acts, shape, this.classes, { bins: o.bins, range: layer.range });
    const values: ProbeLayerValues = {
      act_mean: mean,
      act_std: std,
      mi_input: binned.mi_input,
      mi_label: binned.mi_label,
      mi_saturated: binned.saturated ? 1 : 0,
      probe_rows: binned.rows,
    };
    const sat = saturationFraction(acts, layer.kind, layer.range);
    if (sat !== null) values.act_saturation = sat;
    const t1 = performance.now();
    timing.binned += t1 - t0;
    if (o.boundRows > 0) {
      const noise = o.noiseVariance === null ? { noiseRatio: o.noiseRatio ?? DEFAULT_NOISE_RATIO } : { noiseVariance: o.noiseVariance };
      const b = pairwiseInformationBounds(acts, shape, this.classes, { ...noise, maxRows: o.boundRows });
      values.mi_input_upper = b.mi_input_upper;
      values.mi_input_lower = b.mi_input_lower;
      values.mi_label_pairwise = b.mi_label;
      values.mi_bounds_saturated = b.saturated ? 1 : 0;
      if (Number.isFinite(b.noise_variance)) values.mi_noise_variance = b.noise_variance;
      timing.bounds += performance.now() - t1;
    }
    if (o.linearRows > 0) {
      const t2 = performance.now();
      const r = linearProbeInformation(acts, shape, this.classes, { maxRows: o.linearRows });
      if (Number.isFinite(r.mi_label_lower)) {
        values.mi_label_linear = r.mi_label_lower;
        values.linear_accuracy = r.accuracy;
      }
      timing.linear += performance.now() - t2;
    }
    return values;
  }

  dispose(): void {
    if (this.disposed) return;
    this.disposed = true;
    tf.dispose(this.xs);
  }
}

/** A probe failure during training, as the coded error the monitor reports. */
export function probeFailure(e: unknown): TidemarkError {
  return e instanceof TidemarkError ? e : new TidemarkError('TIDEMARK_ERR_PROBE', `The probe failed: ${(e as Error)?.message ?? String(e)}. The window is kept without probe values.`, { cause: e });
}
