/**
 * Checks of the reference noise-scale computation (test/helpers/exact-noise.ts) and of the MNIST loader
 * (test/helpers/mnist.ts) against outside references: closed-form gradients of a linear model, the definition of
 * the per-example covariance, Cochran's finite-population correction, tfjs's own `evaluate`, the definition of the
 * directional derivative, and the `mnist` package's own accessor.
 */
import { createRequire } from 'node:module';
import { beforeAll, describe, expect, it } from 'vitest';
import { exactNoiseScale, type ExactNoiseScale } from './exact-noise.js';
import { MNIST_CLASSES, MNIST_PIXELS, mnistDigits, mnistSplit, mnistTensors } from './mnist.js';
import { withSeededShuffle } from './phase-runs.js';
import { gaussian, mulberry32 } from './random.js';
import { tf, useCpu, weightsOf } from './tf.js';

beforeAll(useCpu);

const rel = (a: number, b: number) => Math.abs(a - b) / Math.abs(b);

// ---------------------------------------------------------------------------------------------------------------
// A linear model: one dense unit, meanSquaredError. Per example, loss = (w·x + c − y)² (tfjs meanSquaredError is
// the mean over the last axis of (ŷ − y)², one output here; tfjs-layers losses.js), so its gradient is
// g_n = 2 r_n [x_n, 1] with r_n = w·x_n + c − y_n (derived here by the chain rule).
// ---------------------------------------------------------------------------------------------------------------

const D = 3;

interface LinearData {
  x: Float32Array;
  y: Float32Array;
  n: number;
}

function linearData(n: number, seed: number): LinearData {
  const rng = mulberry32(seed);
  const x = new Float32Array(n * D);
  const y = new Float32Array(n);
  const truth = [1.5, -2, 0.5];
  for (let i = 0; i < n; i++) {
    let s = 0.7;
    for (let j = 0; j < D; j++) {
      x[i * D + j] = gaussian(rng);
      s += truth[j]! * x[i * D + j]!;
    }
    y[i] = s + 0.3 * gaussian(rng);
  }
  return { x, y, n };
}

function linearModel(seed: number, l2 = 0): tf.Sequential {
  const model = tf.sequential({
    layers: [
      tf.layers.dense({
        units: 1,
        inputShape: [D],
        name: 'line',
        kernelInitializer: tf.initializers.glorotUniform({ seed }),
        biasInitializer: tf.initializers.constant({ value: 0.3 }),
        ...(l2 > 0 ? { kernelRegularizer: tf.regularizers.l2({ l2 }) } : {}),
      }),
    ],
  });
  model.compile({ optimizer: tf.train.sgd(0.1), loss: 'meanSquaredError' });
  return model;
}

interface HandVariable {
  G: number[];
  gradNormSq: number;
  /** b · mean_i ‖g_i − G‖² · (N − 1)/(N − b) over consecutive minibatches of b rows. */
  traceSigma: number;
  /** (1/N) Σ_n ‖g_n − G‖²: Σ's trace by its definition, the population of N per-example gradients. */
  traceSigmaPopulation: number;
}

/**
 * The same quantities by hand, in float64, from the closed-form per-example gradients (McCandlish et al. 2018,
 * "An Empirical Model of Large-Batch Training", §2: G = E[g], Σ = Cov[g], B_simple = tr Σ/|G|², eq. 2.9 from
 * memory; the finite-population factor (N − 1)/(N − b) from Cochran 1977, "Sampling Techniques", Theorem 2.2,
 * from memory). The regulariser λ‖w‖² (tfjs-layers regularizers.js, L1L2.apply: l2 · sum(x²)) adds 2λw to G.
 */
function handLinear(model: tf.LayersModel, data: LinearData, b: number, l2 = 0) {
  const [kernel, bias] = model.getWeights().map((t) => Array.from(t.dataSync()));
  const w = kernel!;
  const c = bias![0]!;
  const { x, y, n } = data;
  const per: number[][] = [];
  let loss = 0;
  for (let i = 0; i < n; i++) {
    let r = c - y[i]!;
    for (let j = 0; j < D; j++) r += w[j]! * x[i * D + j]!;
    loss += (r * r) / n;
    per.push([...Array.from({ length: D }, (_, j) => 2 * r * x[i * D + j]!), 2 * r]);
  }
  loss += l2 * w.reduce((s, v) => s + v * v, 0);
  const mean = (rows: number[][]) => rows[0]!.map((_, k) => rows.reduce((s, g) => s + g[k]!, 0) / rows.length);
  const G = mean(per);
  const m = Math.floor(n / b);
  const batches = Array.from({ length: m }, (_, i) => mean(per.slice(i * b, (i + 1) * b)));
  const coords = { kernel: [0, 1, 2], bias: [3] };
  const out = {} as Record<'kernel' | 'bias', HandVariable>;
  for (const [name, ks] of Object.entries(coords) as Array<['kernel' | 'bias', number[]]>) {
    const sq = (g: number[]) => ks.reduce((s, k) => s + (g[k]! - G[k]!) ** 2, 0);
    const Gv = ks.map((k) => G[k]! + (name === 'kernel' ? 2 * l2 * w[k]! : 0));
    out[name] = {
      G: Gv,
      gradNormSq: Gv.reduce((s, v) => s + v * v, 0),
      traceSigma: ((b * batches.reduce((s, g) => s + sq(g), 0)) / m) * ((n - 1) / (n - b)),
      traceSigmaPopulation: per.reduce((s, g) => s + sq(g), 0) / n,
    };
  }
  return { loss, ...out };
}

function tensorsOf(data: LinearData, order?: number[]) {
  return tf.tidy(() => {
    const xs = tf.tensor2d(data.x, [data.n, D]);
    const ys = tf.tensor2d(data.y, [data.n, 1]);
    if (!order) return { xs, ys };
    const idx = tf.tensor1d(order, 'int32');
    return { xs: tf.gather(xs, idx) as tf.Tensor2D, ys: tf.gather(ys, idx) as tf.Tensor2D };
  });
}

function variableNames(model: tf.LayersModel): { kernel: string; bias: string } {
  const [k, b] = model.layers[0]!.trainableWeights.map((w) => (w.read() as tf.Variable).name);
  return { kernel: k!, bias: b! };
}

/** Runs the reference and checks it changed no weight and left no tensor behind. */
async function frozenRun(model: tf.LayersModel, xs: tf.Tensor, ys: tf.Tensor, b: number, chunkSize?: number): Promise<ExactNoiseScale> {
  const before = await weightsOf(model);
  const tensors = tf.memory().numTensors;
  const r = exactNoiseScale(model, xs, ys, { batchSize: b, ...(chunkSize ? { chunkSize } : {}) });
  expect(tf.memory().numTensors).toBe(tensors);
  const after = await weightsOf(model);
  after.forEach((a, i) => expect(Array.from(a)).toEqual(Array.from(before[i]!)));
  return r;
}

describe('exactNoiseScale on a linear model (closed-form per-example gradients)', () => {
  it('matches G, |G|², tr Σ and B_simple computed by hand, per variable, layer and network', async () => {
    const data = linearData(64, 5);
    const model = linearModel(21);
    const { xs, ys } = tensorsOf(data);
    // b = 8 divides N = 64; chunks of 20 rows (20, 20, 20, 4) exercise the chunk weighting of G.
    const r = await frozenRun(model, xs, ys, 8, 20);
    const hand = handLinear(model, data, 8);
    const names = variableNames(model);
    expect(r.rows).toBe(64);
    expect(r.minibatches).toBe(8);
    expect(r.droppedRows).toBe(0);
    expect(rel(r.loss, hand.loss)).toBeLessThan(1e-4);
    for (const v of ['kernel', 'bias'] as const) {
      const got = r.variables[names[v]]!;
      expect(got.layer).toBe('line');
      expect(got.params).toBe(v === 'kernel' ? D : 1);
      Array.from(r.gradient[names[v]]!).forEach((g, k) => expect(rel(g, hand[v].G[k]!)).toBeLessThan(1e-4));
      expect(rel(got.gradNormSq, hand[v].gradNormSq)).toBeLessThan(1e-4);
      expect(rel(got.traceSigma, hand[v].traceSigma)).toBeLessThan(1e-4);
      expect(rel(got.bSimple, hand[v].traceSigma / hand[v].gradNormSq)).toBeLessThan(1e-4);
      expect(rel(got.snr, Math.sqrt((8 * hand[v].gradNormSq) / hand[v].traceSigma))).toBeLessThan(1e-4);
    }
    // Layer and network pool kernel and bias: sums of |G|² and tr Σ, then the ratio (methods.md §1.4).
    const g2 = hand.kernel.gradNormSq + hand.bias.gradNormSq;
    const tr = hand.kernel.traceSigma + hand.bias.traceSigma;
    for (const pooled of [r.layers.line!, r.network]) {
      expect(pooled.params).toBe(D + 1);
      expect(rel(pooled.gradNormSq, g2)).toBeLessThan(1e-4);
      expect(rel(pooled.traceSigma, tr)).toBeLessThan(1e-4);
      expect(rel(pooled.bSimple, tr / g2)).toBeLessThan(1e-4);
    }
    expect(Object.keys(r.layers)).toEqual(['line']);
    tf.dispose([xs, ys]);
    model.dispose();
  });

  it('at b = 1 gives tr Σ by its definition, (1/N) Σ_n ‖g_n − G‖²', async () => {
    // McCandlish et al. 2018 §2: Σ is the covariance of one example's gradient; over a training set of N rows
    // drawn uniformly, the population covariance (divisor N). (N − 1)/(N − b) = 1 at b = 1.
    const data = linearData(40, 6);
    const model = linearModel(22);
    const { xs, ys } = tensorsOf(data);
    const r = await frozenRun(model, xs, ys, 1);
    const hand = handLinear(model, data, 1);
    const names = variableNames(model);
    for (const v of ['kernel', 'bias'] as const) {
      expect(rel(r.variables[names[v]]!.traceSigma, hand[v].traceSigmaPopulation)).toBeLessThan(1e-4);
    }
    tf.dispose([xs, ys]);
    model.dispose();
  });

  it("is unbiased for tr Σ over row orders: the 7 rounds of a round robin on 8 rows average to the definition", async () => {
    // Cochran 1977, "Sampling Techniques", Theorem 2.2 (from memory): a simple random sample of b of N values has
    // E‖ḡ_b − G‖² = (σ²/b)(N − b)/(N − 1), σ² the population variance. The circle method of a round-robin schedule
    // (common practice, no source) splits 8 rows into 4 pairs in each of 7 rounds and meets every one of the 28
    // pairs exactly once, so the average over the rounds of the partition mean equals the mean over all pairs, the
    // expectation itself: the 7 helper values at b = 2 must average to (1/N) Σ_n ‖g_n − G‖² exactly (up to float32
    // gradients). A factor N/(N − b) would overshoot by 8/7; none would undershoot by 6/7.
    const data = linearData(8, 7);
    const model = linearModel(23);
    const names = variableNames(model);
    const rounds: number[][] = [];
    for (let r = 0; r < 7; r++) {
      const order = [r, 7];
      for (let k = 1; k <= 3; k++) order.push((r + k) % 7, (r - k + 7) % 7);
      rounds.push(order);
    }
    const pairs = new Set(rounds.flatMap((o) => [0, 2, 4, 6].map((i) => [o[i]!, o[i + 1]!].sort().join('-'))));
    expect(pairs.size).toBe(28);
    const sums = { kernel: 0, bias: 0 };
    const singles: number[] = [];
    for (const order of rounds) {
      const { xs, ys } = tensorsOf(data, order);
      const r = await frozenRun(model, xs, ys, 2);
      sums.kernel += r.variables[names.kernel]!.traceSigma / 7;
      sums.bias += r.variables[names.bias]!.traceSigma / 7;
      singles.push(r.network.traceSigma);
      tf.dispose([xs, ys]);
    }
    const hand = handLinear(model, data, 1);
    expect(rel(sums.kernel, hand.kernel.traceSigmaPopulation)).toBeLessThan(1e-4);
    expect(rel(sums.bias, hand.bias.traceSigmaPopulation)).toBeLessThan(1e-4);
    // One round alone is one draw: its value differs from the expectation (here by more than 1 %).
    const popNet = hand.kernel.traceSigmaPopulation + hand.bias.traceSigmaPopulation;
    expect(Math.max(...singles.map((s) => rel(s, popNet)))).toBeGreaterThan(0.01);
    model.dispose();
  });

  it('drops the N mod b last rows from the minibatches but not from G', async () => {
    const data = linearData(64, 8);
    const model = linearModel(24);
    const { xs, ys } = tensorsOf(data);
    const r = await frozenRun(model, xs, ys, 10);
    const hand = handLinear(model, data, 10); // 6 minibatches of rows 0..59; G over 64 rows; factor 63/54
    expect(r.minibatches).toBe(6);
    expect(r.droppedRows).toBe(4);
    expect(rel(r.network.gradNormSq, hand.kernel.gradNormSq + hand.bias.gradNormSq)).toBeLessThan(1e-4);
    expect(rel(r.network.traceSigma, hand.kernel.traceSigma + hand.bias.traceSigma)).toBeLessThan(1e-4);
    tf.dispose([xs, ys]);
    model.dispose();
  });

  it('adds the L2 regulariser to the loss and to G, not to tr Σ', async () => {
    const data = linearData(48, 9);
    const model = linearModel(25, 0.05);
    const { xs, ys } = tensorsOf(data);
    const r = await frozenRun(model, xs, ys, 8);
    const hand = handLinear(model, data, 8, 0.05);
    const names = variableNames(model);
    expect(rel(r.loss, hand.loss)).toBeLessThan(1e-4);
    Array.from(r.gradient[names.kernel]!).forEach((g, k) => expect(rel(g, hand.kernel.G[k]!)).toBeLessThan(1e-4));
    expect(rel(r.variables[names.kernel]!.gradNormSq, hand.kernel.gradNormSq)).toBeLessThan(1e-4);
    expect(rel(r.variables[names.kernel]!.traceSigma, hand.kernel.traceSigma)).toBeLessThan(1e-4);
    tf.dispose([xs, ys]);
    model.dispose();
  });

  it('refuses a batch size that is not a whole number below N', () => {
    const data = linearData(16, 10);
    const model = linearModel(26);
    const { xs, ys } = tensorsOf(data);
    expect(() => exactNoiseScale(model, xs, ys, { batchSize: 16 })).toThrow(/batchSize/);
    expect(() => exactNoiseScale(model, xs, ys, { batchSize: 2.5 })).toThrow(/batchSize/);
    tf.dispose([xs, ys]);
    model.dispose();
  });
});

describe('mnistSplit (the mnist package, 1.1.0)', () => {
  it('draws a seeded, balanced, disjoint split whose rows are the package’s own digits', () => {
    const split = mnistSplit({ train: 2000, validation: 505, seed: 3 });
    const count = (labels: number[]) => labels.reduce((c, l) => (c[l]!++, c), new Array<number>(MNIST_CLASSES).fill(0));
    expect(count(split.train.labels)).toEqual(new Array(MNIST_CLASSES).fill(200));
    const val = count(split.validation.labels);
    expect(val.filter((c) => c === 51).length).toBe(5);
    expect(val.filter((c) => c === 50).length).toBe(5);
    const key = (p: typeof split.train, i: number) => `${p.labels[i]}:${p.source[i]}`;
    const trainKeys = new Set(split.train.labels.map((_, i) => key(split.train, i)));
    expect(trainKeys.size).toBe(2000);
    expect(split.validation.labels.some((_, i) => trainKeys.has(key(split.validation, i)))).toBe(false);
    // Rows against the package's accessor mnist[d].get(i) (cazala/mnist, src/mnist.js).
    const pkg = createRequire(import.meta.url)('mnist') as Record<number, { get(i: number): number[] }>;
    for (const i of [0, 1, 999, 1999]) {
      const fromPackage = Float32Array.from(pkg[split.train.labels[i]!]!.get(split.train.source[i]!));
      expect(Array.from(split.train.x.subarray(i * MNIST_PIXELS, (i + 1) * MNIST_PIXELS))).toEqual(Array.from(fromPackage));
    }
    expect(split.train.x.every((v) => v >= 0 && v <= 1)).toBe(true);
    // Same seed, same rows in the same order, whatever the other parts' sizes; another seed, other rows.
    const again = mnistSplit({ train: 2000, seed: 3 });
    expect(again.train.source).toEqual(split.train.source);
    expect(again.train.labels).toEqual(split.train.labels);
    expect(mnistSplit({ train: 2000, seed: 4 }).train.source).not.toEqual(split.train.source);
    // Class 5 has the fewest digits: 863 in the package.
    expect(mnistDigits()[5]!.count).toBe(863);
    expect(() => mnistSplit({ train: 8000, test: 1000 })).toThrow(/class 5/);
  });

  it('keeps excluded digits out of every part (a development split that never sees a benchmark’s test rows)', () => {
    const bench = mnistSplit({ train: 3000, validation: 1000, test: 1000, seed: 1 });
    const dev = mnistSplit({ train: 3000, validation: 1000, test: 1000, seed: 2, exclude: bench.test });
    const key = (labels: number[], source: number[]) => labels.map((l, i) => `${l}:${source[i]}`);
    const held = new Set(key(bench.test.labels, bench.test.source));
    expect(held.size).toBe(1000);
    for (const part of [dev.train, dev.validation, dev.test]) {
      expect(part.rows).toBe(part === dev.train ? 3000 : 1000);
      expect(key(part.labels, part.source).filter((k) => held.has(k))).toEqual([]);
    }
    // 863 digits of class 5, 100 of them excluded: 763 remain for the parts' 500.
    expect(() => mnistSplit({ train: 7000, test: 700, exclude: bench.test })).toThrow(/763 not excluded/);
  });
});

describe('exactNoiseScale on MNIST (784→64→32→10 relu, after 315 SGD steps)', () => {
  it('pools layers into the network, leaves the weights alone and differentiates the loss tfjs evaluates', async () => {
    const tensorsAtStart = tf.memory().numTensors;
    const split = mnistSplit({ train: 2000, seed: 1 });
    const { xs, ys } = mnistTensors(split.train);
    const model = tf.sequential();
    model.add(tf.layers.dense({ units: 64, inputShape: [MNIST_PIXELS], activation: 'relu', name: 'hidden1', kernelInitializer: tf.initializers.glorotUniform({ seed: 11 }) }));
    model.add(tf.layers.dense({ units: 32, activation: 'relu', name: 'hidden2', kernelInitializer: tf.initializers.glorotUniform({ seed: 12 }) }));
    model.add(tf.layers.dense({ units: 10, activation: 'softmax', name: 'output', kernelInitializer: tf.initializers.glorotUniform({ seed: 13 }) }));
    const optimizer = tf.train.sgd(0.05);
    model.compile({ optimizer, loss: 'categoricalCrossentropy' });
    const tensorsBefore = tf.memory().numTensors;
    // 5 epochs of 63 minibatches (62 of 32 rows and one of 16).
    await withSeededShuffle(3, () => model.fit(xs, ys, { epochs: 5, batchSize: 32, verbose: 0 }));
    expect(tf.memory().numTensors).toBe(tensorsBefore);

    const r = await frozenRun(model, xs, ys, 32);
    expect(r.minibatches).toBe(62);
    expect(r.droppedRows).toBe(16);
    expect(r.network.params).toBe(784 * 64 + 64 + 64 * 32 + 32 + 32 * 10 + 10);
    expect(Object.keys(r.layers)).toEqual(['hidden1', 'hidden2', 'output']);
    expect(Number.isFinite(r.network.bSimple) && r.network.bSimple > 0).toBe(true);
    // Norms add in squares: the network pools its layers by summing |G|² and tr Σ (methods.md §1.4, row 5 of §1.5).
    const layers = Object.values(r.layers);
    const sum = (f: (s: (typeof layers)[number]) => number) => layers.reduce((s, l) => s + f(l), 0);
    expect(rel(r.network.gradNormSq, sum((l) => l.gradNormSq))).toBeLessThan(1e-12);
    expect(rel(r.network.traceSigma, sum((l) => l.traceSigma))).toBeLessThan(1e-12);
    // A ratio of sums lies between the smallest and the largest of the ratios.
    const ratios = layers.map((l) => l.bSimple);
    expect(r.network.bSimple).toBeGreaterThanOrEqual(Math.min(...ratios));
    expect(r.network.bSimple).toBeLessThanOrEqual(Math.max(...ratios));

    // The loss is the one tfjs's own evaluate reports on the whole set (relu/softmax: no training-only layers).
    const evaluated = model.evaluate(xs, ys, { batchSize: 500 }) as tf.Scalar;
    expect(rel(r.loss, evaluated.dataSync()[0]!)).toBeLessThan(1e-5);
    evaluated.dispose();

    // G is the gradient of that loss: the central difference (L(w + tu) − L(w − tu))/(2t) along u = G/|G| is the
    // directional derivative G·u = |G| (definition of the gradient; error O(t²), common practice, no source).
    const norm = Math.sqrt(r.network.gradNormSq);
    const t = 0.003;
    const vars = model.trainableWeights;
    const originals = vars.map((v) => tf.clone(v.read()));
    const lossAt = (step: number): number => {
      vars.forEach((v, k) => {
        const g = tf.tensor(Float32Array.from(r.gradient[(v.read() as tf.Variable).name]!), originals[k]!.shape);
        const moved = tf.tidy(() => tf.add(originals[k]!, tf.mul(g, step / norm)));
        v.write(moved);
        tf.dispose([g, moved]);
      });
      const l = model.evaluate(xs, ys, { batchSize: 500 }) as tf.Scalar;
      const value = l.dataSync()[0]!;
      l.dispose();
      return value;
    };
    const slope = (lossAt(t) - lossAt(-t)) / (2 * t);
    vars.forEach((v, k) => v.write(originals[k]!));
    tf.dispose(originals);
    expect(rel(slope, norm)).toBeLessThan(0.005);

    tf.dispose([xs, ys]);
    model.dispose();
    optimizer.dispose();
    expect(tf.memory().numTensors).toBe(tensorsAtStart);
  });
});
