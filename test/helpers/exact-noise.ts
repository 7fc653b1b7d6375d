/**
 * An independent reference computation of the fixed-weight simple noise scale, the yardstick for the
 * library's windowed estimator. It imports nothing from src/.
 *
 * Source: S. McCandlish, J. Kaplan, D. Amodei and the OpenAI Dota Team (2018), "An Empirical Model of
 * Large-Batch Training", arXiv:1812.06162, §2: B_simple = tr(Σ) / |G|² (eq. 2.9, number from memory), where G
 * is the true gradient and Σ the covariance of one example's gradient (methods.md §1.1). The computation
 * follows methods.md §10.1:
 *
 * - The weights are frozen: only gradients are computed (tf.variableGrads), nothing is applied. Layers that
 *   write state in training mode (batch normalisation's moving statistics) get their non-trainable weights
 *   put back at the end.
 * - G is the gradient of the model's mean training loss over the whole training set (the compiled loss, as
 *   `fit` computes it: `lossFunctions[0](y, model.apply(x, {training: true}))`, mean over rows, plus the
 *   regulariser losses `calculateLosses()`), computed in chunks weighted by chunk size, summed in float64.
 * - g_i, i = 1..M, are the gradients of the mean loss of a fixed partition of the rows, in their given order,
 *   into M = ⌊N/b⌋ consecutive minibatches of b rows. When b does not divide N the last N mod b rows are in
 *   no minibatch (they still count in G): reported as `droppedRows`. With rows in random order, each
 *   minibatch is still a simple random sample of b of the N rows.
 * - tr Σ = b · mean_i ‖g_i − G‖² · (N − 1)/(N − b). The minibatches are drawn without replacement from a
 *   finite population of N examples, so E‖g_i − G‖² = (tr Σ / b) · (N − b)/(N − 1), with Σ the population
 *   covariance of the N per-example gradients (divisor N): the finite-population correction of W. G. Cochran,
 *   "Sampling Techniques" (3rd ed., 1977), Theorem 2.2, V(ȳ) = (S²/n)(1 − n/N) with S² of divisor N − 1
 *   (from memory); methods.md §1.4 and §10.1. With b = 1 the formula is the definition itself,
 *   (1/N) Σ_n ‖g_n − G‖², and no sampling error is left; for b > 1 it is an unbiased estimate over random
 *   orders of the rows (one fixed order gives one draw).
 * - Norms add in squares, so a layer pools its variables (kernel and bias) and the network pools its layers
 *   by summing |G|² and tr Σ; B_simple is then the ratio of the sums (methods.md §1.4, "Per-layer aggregation").
 *
 * Regulariser gradients are the same in every g_i and in G, so they cancel in g_i − G: the deviations are taken
 * between data-loss gradients only, and the regulariser gradient is added to G for |G|² (exact arithmetic gives
 * the same; this keeps float32 rounding of the added term out of the deviations). Sample and class weights are
 * not supported (fit's are not seen here). Dropout-like layers make the gradients random in training mode.
 */
import * as tf from '@tensorflow/tfjs';

export interface NoiseStats {
  /** Number of parameters pooled. */
  params: number;
  /** |G|², the squared norm of the full-training-set gradient. */
  gradNormSq: number;
  /** mean_i ‖g_i − G‖² over the M minibatches of b rows (the minibatch gradient's variance, measured). */
  meanSqDeviation: number;
  /** tr Σ of one example's gradient: b · meanSqDeviation · (N − 1)/(N − b). */
  traceSigma: number;
  /** B_simple = tr Σ / |G|². */
  bSimple: number;
  /** Per-minibatch SNR at batch size b: |G| / sqrt(tr Σ / b) = sqrt(b / B_simple). */
  snr: number;
}

export interface VariableNoiseStats extends NoiseStats {
  /** Name of the tfjs layer that owns the variable. */
  layer: string;
}

export interface ExactNoiseScale {
  /** N, rows of the training set. */
  rows: number;
  /** b. */
  batchSize: number;
  /** M = ⌊N/b⌋. */
  minibatches: number;
  /** N mod b: rows in G but in no minibatch. */
  droppedRows: number;
  /** The full-training-set mean training loss at these weights, regularisers included. */
  loss: number;
  /** Keyed by variable name (`layer.trainableWeights[i].read().name`). */
  variables: Record<string, VariableNoiseStats>;
  /** Keyed by the tfjs layer's own name: its variables pooled. */
  layers: Record<string, NoiseStats>;
  /** All trainable variables pooled. */
  network: NoiseStats;
  /** G itself (regulariser included), float64, keyed like `variables`, in each variable's own element order. */
  gradient: Record<string, Float64Array>;
  /** Wall time of the whole computation, ms. */
  millis: number;
}

export interface ExactNoiseOptions {
  /** b, the minibatch size: a whole number, 1 ≤ b < N. */
  batchSize: number;
  /** Rows per forward/backward pass while computing G; default 500. */
  chunkSize?: number;
}

type LossFn = (yTrue: tf.Tensor, yPred: tf.Tensor) => tf.Tensor;

interface CompiledInternals {
  lossFunctions?: LossFn[];
  calculateLosses?: () => tf.Scalar[];
}

/** The squared norms and B_simple of one pool, from float64 sums. */
function stats(params: number, gradNormSq: number, meanSqDeviation: number, n: number, b: number): NoiseStats {
  // Cochran's finite-population correction (see the module comment): tr Σ = b · E‖g_i − G‖² · (N − 1)/(N − b).
  const traceSigma = (b * meanSqDeviation * (n - 1)) / (n - b);
  const bSimple = traceSigma / gradNormSq;
  return { params, gradNormSq, meanSqDeviation, traceSigma, bSimple, snr: Math.sqrt(b / bSimple) };
}

function rowsOf(t: tf.Tensor, start: number, size: number): tf.Tensor {
  return tf.slice(t, [start, ...new Array<number>(t.rank - 1).fill(0)], [size, ...new Array<number>(t.rank - 1).fill(-1)]);
}

/**
 * The fixed-weight simple noise scale of `model` on the training set (xs, ys), per variable, per layer and
 * for the network, at minibatch size `batchSize`. Synchronous (reads gradients with dataSync); creates no
 * lasting tensors and changes no weight.
 */
export function exactNoiseScale(
  trained: tf.LayersModel,
  xs: tf.Tensor,
  ys: tf.Tensor,
  options: ExactNoiseOptions,
): ExactNoiseScale {
  const started = performance.now();
  // A tf.Sequential compiles, fits and holds its loss in an inner functional model (tfjs-layers models.js,
  // Sequential.compile calls this.model.compile); work on that one, whose layers are the same objects.
  const model = trained instanceof tf.Sequential ? (trained as unknown as { model: tf.LayersModel }).model : trained;
  const internals = model as unknown as CompiledInternals;
  const lossFn = internals.lossFunctions?.[0];
  if (!lossFn || typeof internals.calculateLosses !== 'function') {
    throw new Error('exactNoiseScale: the model must be compiled (no lossFunctions / calculateLosses found)');
  }
  if (model.inputs.length !== 1 || model.outputs.length !== 1 || internals.lossFunctions!.length !== 1) {
    throw new Error('exactNoiseScale: only models with one input, one output and one loss are supported');
  }
  const n = xs.shape[0]!;
  const b = options.batchSize;
  const chunk = options.chunkSize ?? 500;
  if (ys.shape[0] !== n) throw new Error(`exactNoiseScale: xs has ${n} rows but ys has ${ys.shape[0]}`);
  if (!Number.isInteger(b) || b < 1 || b >= n) {
    throw new Error(`exactNoiseScale: batchSize must be a whole number with 1 ≤ b < N = ${n}, got ${b}`);
  }
  if (!Number.isInteger(chunk) || chunk < 1) throw new Error(`exactNoiseScale: chunkSize must be a whole number ≥ 1, got ${chunk}`);

  // Trainable variables and the layer that owns each (a LayerVariable's read() is its tf.Variable).
  const variableOf = (w: { read(): tf.Tensor }): tf.Variable => {
    const v = w.read();
    if (!(v instanceof tf.Variable)) throw new Error('exactNoiseScale: a layer weight did not read as a tf.Variable');
    return v;
  };
  const owner = new Map<string, string>();
  for (const layer of model.layers) {
    for (const w of layer.trainableWeights) {
      const name = variableOf(w).name;
      if (!owner.has(name)) owner.set(name, layer.name);
    }
  }
  const vars = model.trainableWeights.map(variableOf);
  const names = vars.map((v) => v.name);
  for (const name of names) {
    if (!owner.has(name)) throw new Error(`exactNoiseScale: trainable variable ${name} belongs to no layer of the model`);
  }
  const sizes = vars.map((v) => v.size);

  // Layers that write state in training mode (batch normalisation) are put back at the end.
  const stateful = model.nonTrainableWeights;
  const saved = stateful.map((w) => tf.clone(w.read()));

  const dataLoss = (x: tf.Tensor, y: tf.Tensor): tf.Scalar => {
    const yPred = model.apply(x, { training: true }) as tf.Tensor;
    return tf.mean(lossFn(y, yPred)) as tf.Scalar;
  };

  /** Gradients of `f` by variable, read into float32 arrays (zeros where f does not depend on a variable); f's value. */
  const gradsOf = (f: () => tf.Scalar): { value: number; grads: Float32Array[] } =>
    tf.tidy(() => {
      const { value, grads } = tf.variableGrads(f, vars);
      return {
        value: value.dataSync()[0]!,
        grads: names.map((name, k) => {
          const g = grads[name];
          return g ? (g.dataSync() as Float32Array) : new Float32Array(sizes[k]!);
        }),
      };
    });

  try {
    // G of the data loss: chunk gradients weighted by chunk size, summed in float64.
    const gData = sizes.map((s) => new Float64Array(s));
    let loss = 0;
    for (let start = 0; start < n; start += chunk) {
      const size = Math.min(chunk, n - start);
      const weight = size / n;
      const { value, grads } = gradsOf(() => tf.tidy(() => dataLoss(rowsOf(xs, start, size), rowsOf(ys, start, size))));
      loss += weight * value;
      grads.forEach((g, k) => {
        const acc = gData[k]!;
        for (let j = 0; j < g.length; j++) acc[j]! += weight * g[j]!;
      });
    }

    // The regulariser's gradient, added to G (it cancels in every g_i − G).
    const gTotal = gData.map((g) => Float64Array.from(g));
    const hasRegularisers = tf.tidy(() => internals.calculateLosses!().length > 0);
    if (hasRegularisers) {
      const { value, grads } = gradsOf(() =>
        tf.tidy(() => internals.calculateLosses!().reduce((a, c) => tf.add(a, c), tf.scalar(0)) as tf.Scalar),
      );
      loss += value;
      grads.forEach((g, k) => {
        const acc = gTotal[k]!;
        for (let j = 0; j < g.length; j++) acc[j]! += g[j]!;
      });
    }

    // Σ_i ‖g_i − G‖² per variable over the fixed partition into consecutive minibatches.
    const m = Math.floor(n / b);
    const dev = new Float64Array(vars.length);
    for (let i = 0; i < m; i++) {
      const { grads } = gradsOf(() => tf.tidy(() => dataLoss(rowsOf(xs, i * b, b), rowsOf(ys, i * b, b))));
      grads.forEach((g, k) => {
        const mean = gData[k]!;
        let s = 0;
        for (let j = 0; j < g.length; j++) {
          const d = g[j]! - mean[j]!;
          s += d * d;
        }
        dev[k]! += s;
      });
    }

    // Pool: variable → layer → network (sums of squares).
    const variables: Record<string, VariableNoiseStats> = {};
    const layerSums = new Map<string, { params: number; g2: number; dev: number }>();
    let net = { params: 0, g2: 0, dev: 0 };
    names.forEach((name, k) => {
      let g2 = 0;
      for (const v of gTotal[k]!) g2 += v * v;
      const meanDev = dev[k]! / m;
      const layer = owner.get(name)!;
      variables[name] = { layer, ...stats(sizes[k]!, g2, meanDev, n, b) };
      const l = layerSums.get(layer) ?? { params: 0, g2: 0, dev: 0 };
      layerSums.set(layer, { params: l.params + sizes[k]!, g2: l.g2 + g2, dev: l.dev + meanDev });
      net = { params: net.params + sizes[k]!, g2: net.g2 + g2, dev: net.dev + meanDev };
    });
    const layers: Record<string, NoiseStats> = {};
    for (const [layer, s] of layerSums) layers[layer] = stats(s.params, s.g2, s.dev, n, b);
    const gradient: Record<string, Float64Array> = {};
    names.forEach((name, k) => (gradient[name] = gTotal[k]!));

    return {
      rows: n,
      batchSize: b,
      minibatches: m,
      droppedRows: n - m * b,
      loss,
      variables,
      layers,
      network: stats(net.params, net.g2, net.dev, n, b),
      gradient,
      millis: performance.now() - started,
    };
  } finally {
    stateful.forEach((w, k) => w.write(saved[k]!));
    tf.dispose(saved);
  }
}
