/**
 * The noise measurement through monitor(): fixed-weight noise scales against exact values. Here a linear
 * model whose gradient mean and covariance are formulas; real data (MNIST digits) is in noise-real.test.ts.
 */
import { beforeAll, describe, expect, it } from 'vitest';
import { monitor } from '../../src/index.js';
import type { WindowRecord } from '../../src/protocol/records.js';
import { NoiseMeter, resolveNoiseOptions } from '../../src/callback/noise-meter.js';
import { viewModel } from '../../src/callback/model-layers.js';
import { gaussian, mulberry32 } from '../helpers/random.js';
import { tf, useCpu, weightsOf } from '../helpers/tf.js';

beforeAll(useCpu);

const D = 32;
const SIGMA = 0.5;

/**
 * Least squares y ≈ w·x + b with x ~ N(0, I_d), y = w*·x + σε. Per-row gradient of (w·x + b − y)²:
 * 2r·(x, 1) with r = x·δ + b − σε, δ = w − w*. By Isserlis' theorem (E[x_i x_j x_k x_l] for Gaussians;
 * Isserlis 1918, Biometrika 12, from memory): G = 2(δ, b), |G|² = 4(|δ|² + b²) and
 * tr Σ = 4[|δ|²(d + 2) + (b² + σ²)d + σ²], so B_simple = [|δ|²(d+2) + (b²+σ²)d + σ²] / (|δ|² + b²)
 * (McCandlish et al. 2018, B_simple = tr Σ/|G|², methods.md §1.1; derivation here).
 */
function exactNoiseScale(delta: number[], b: number): number {
  const d2 = delta.reduce((a, v) => a + v * v, 0);
  return (d2 * (D + 2) + (b * b + SIGMA * SIGMA) * D + SIGMA * SIGMA) / (d2 + b * b);
}

function linearData(rows: number, seed: number): { x: tf.Tensor2D; y: tf.Tensor2D; wStar: number[] } {
  const rng = mulberry32(seed);
  const wStar = Array.from({ length: D }, () => gaussian(rng));
  const xs: number[] = [];
  const ys: number[] = [];
  for (let i = 0; i < rows; i++) {
    let dot = 0;
    for (let j = 0; j < D; j++) {
      const v = gaussian(rng);
      xs.push(v);
      dot += v * wStar[j]!;
    }
    ys.push(dot + SIGMA * gaussian(rng));
  }
  return { x: tf.tensor2d(xs, [rows, D]), y: tf.tensor2d(ys, [rows, 1]), wStar };
}

/** The classic windowed estimate B·s²/(‖m‖² − f·s²/K) from a window's own statistics, for contrast. */
function windowedEstimate(w: WindowRecord): number {
  const s = w.network;
  const f = 1 - w.batches / 40; // the window's minibatches are part of one pass of 40 (methods.md §1.4)
  const signal = s.grad_mean_norm ** 2 - (f * s.grad_std_norm ** 2) / w.batches;
  return signal > 0 ? ((w.batch_size ?? 0) * s.grad_std_norm ** 2) / signal : Number.POSITIVE_INFINITY;
}

describe('noise measurement on a linear model with a known gradient covariance', () => {
  it('matches the exact B_simple within 10 % at a learning rate where the iterates oscillate', async () => {
    // Hessian 2·I: gradient descent multiplies δ by 1 − 2·lr = −0.4 per step at lr 0.7, so the iterates
    // swing across the minimum every step. The batch of 256 keeps SGD stable: E|δ'|² ≈ (0.16 + lr²·4(d+2)/B)|δ|²
    // = 0.42|δ|² until the noise floor, where B_simple has risen from d + 2 = 34 to a few hundred.
    const { x, y, wStar } = linearData(20_000, 5);
    const model = tf.sequential({ layers: [tf.layers.dense({ units: 1, inputShape: [D], kernelInitializer: 'zeros' })] });
    model.compile({ optimizer: tf.train.sgd(0.7), loss: 'meanSquaredError' });
    const before = tf.memory().numTensors;
    const mon = await monitor(model, { store: 'memory', window: 4, noise: { x, y, every: 1, minGroups: 32, maxGroups: 64, targetError: 0.05 } });
    const checks: { step: number; d2: number; exact: number; measured: number | null; windowed: number; sign: number }[] = [];
    mon.onWindow((w) => {
      // Listeners run before the next step: the weights are those the measurement saw.
      const [k, b] = model.getWeights().map((t) => Array.from(t.dataSync()));
      const delta = k!.map((v, i) => v - wStar[i]!);
      checks.push({ step: w.step, d2: delta.reduce((a, v) => a + v * v, 0), exact: exactNoiseScale(delta, b![0]!), measured: w.network.noise_scale, windowed: windowedEstimate(w), sign: Math.sign(delta[0]!) });
      expect(w.noise?.status).toBe('measured');
      expect(w.noise?.population).toBeNull();
    });
    // Window ends at steps 4, 8, …, 40.
    const [tx, ty] = [x.slice(0, 10_240), y.slice(0, 10_240)];
    await model.fit(tx, ty, { epochs: 1, batchSize: 256, shuffle: false, callbacks: [mon.callback] });
    await mon.close();
    tf.dispose([tx, ty]);
    if (process.env.TIDEMARK_NOISE_REPORT) console.table(checks);
    expect(checks.length).toBe(10);
    for (const c of checks) {
      expect(c.measured, `step ${c.step}`).not.toBeNull();
      expect(Math.abs(c.measured! / c.exact - 1), `step ${c.step}: measured ${c.measured}, exact ${c.exact}`).toBeLessThan(0.1);
    }
    // The window's own minibatches, taken at moving weights, miss by far more (methods.md §10.2): the
    // test would tell a windowed estimate from a fixed-weight one.
    const worst = Math.max(...checks.map((c) => Math.abs(Math.log(c.windowed / c.exact))));
    expect(worst).toBeGreaterThan(Math.log(2));
    // And the exact value itself moves a lot over these steps, so a constant could not pass.
    const exacts = checks.map((c) => c.exact);
    expect(Math.max(...exacts) / Math.min(...exacts)).toBeGreaterThan(3);
    expect(tf.memory().numTensors).toBe(before);
    tf.dispose([x, y]);
  });

  it('leaves training bit-identical: the same weights with and without measurements, with dropout', async () => {
    // Dropout draws from Math.random, and fit shuffles with it: a measurement must not move that stream.
    const run = async (noise: boolean): Promise<Float32Array[]> => {
      const rng = mulberry32(9);
      const saved = Math.random;
      Math.random = rng;
      try {
        const model = tf.sequential({
          layers: [
            tf.layers.dense({ units: 8, inputShape: [4], activation: 'tanh', kernelInitializer: tf.initializers.glorotUniform({ seed: 1 }) }),
            tf.layers.dropout({ rate: 0.3 }),
            tf.layers.batchNormalization(),
            tf.layers.dense({ units: 1, kernelInitializer: tf.initializers.glorotUniform({ seed: 2 }) }),
          ],
        });
        model.compile({ optimizer: tf.train.sgd(0.05), loss: 'meanSquaredError' });
        const data = tf.tidy(() => {
          const g = mulberry32(4);
          const xs = Array.from({ length: 256 * 4 }, () => gaussian(g));
          return { x: tf.tensor2d(xs, [256, 4]), y: tf.tensor2d(xs.filter((_, i) => i % 4 === 0), [256, 1]) };
        });
        const mon = await monitor(model, { store: 'memory', window: 4, noise: noise ? { every: 1 } : false });
        await model.fit(data.x, data.y, { epochs: 2, batchSize: 16, callbacks: [mon.callback] });
        await mon.close();
        if (noise) expect(mon.noiseCost()!.calls).toBeGreaterThan(5);
        const w = await weightsOf(model);
        tf.dispose([data.x, data.y]);
        model.dispose();
        return w;
      } finally {
        Math.random = saved;
      }
    };
    const without = await run(false);
    const withNoise = await run(true);
    expect(withNoise.length).toBe(without.length);
    without.forEach((w, i) => expect(Array.from(withNoise[i]!)).toEqual(Array.from(w)));
  });

  it("draws from fit's training rows only (validationSplit), and says why when a loop has none", async () => {
    const model = tf.sequential({ layers: [tf.layers.dense({ units: 2, inputShape: [3], activation: 'softmax' })] });
    model.compile({ optimizer: tf.train.sgd(0.1), loss: 'categoricalCrossentropy' });
    const x = tf.randomNormal([400, 3], 0, 1, 'float32', 1);
    const y = tf.oneHot(tf.tensor1d(Array.from({ length: 400 }, (_, i) => i % 2), 'int32'), 2).toFloat();
    const warnings: string[] = [];
    const mon = await monitor(model, { store: 'memory', window: 5, noise: { every: 1 }, onWarning: (w) => warnings.push(w.code) });
    await model.fit(x, y, { epochs: 1, batchSize: 20, validationSplit: 0.25, callbacks: [mon.callback] });
    const fitted = mon.windows();
    expect(fitted.length).toBeGreaterThan(0);
    for (const w of fitted) expect(w.noise?.population).toBe(300);
    // A custom loop: no fit, no rows given.
    for (let i = 0; i < 5; i++) model.optimizer.minimize(() => tf.losses.softmaxCrossEntropy(y.slice(0, 20), model.predict(x.slice(0, 20)) as tf.Tensor) as tf.Scalar);
    await mon.flush();
    await mon.close();
    const last = mon.windows().at(-1)!;
    // After fit, between fits: no measurement and no warning (by design); the window has no noise values.
    expect(last.noise ?? null).toBeNull();
    expect(last.network.noise_scale).toBeNull();
    expect(warnings).not.toContain('TIDEMARK_ERR_NOISE');
    expect((model as unknown as { fit: unknown }).fit).toBe(tf.Sequential.prototype.fit);
    tf.dispose([x, y]);
  });
});

describe('NoiseMeter', () => {
  it('reports a measurement on non-finite gradients as failed, with no values, and leaves no tensors', () => {
    const model = tf.sequential({ layers: [tf.layers.dense({ units: 1, inputShape: [3] })] });
    model.compile({ optimizer: tf.train.sgd(0.1), loss: 'meanSquaredError' });
    const x = tf.fill([64, 3], Number.NaN);
    const y = tf.zeros([64, 1]);
    const before = tf.memory().numTensors;
    const meter = new NoiseMeter(model, viewModel(model), resolveNoiseOptions({ x, y, every: 1 })!);
    const r = meter.measure(8, Number.POSITIVE_INFINITY);
    meter.dispose();
    expect(r.sample.status).toBe('failed');
    expect(r.sample.reason).toMatch(/non-finite gradient values in group 1/);
    expect(r.grams).toBeNull();
    expect(tf.memory().numTensors).toBe(before);
    tf.dispose([x, y]);
    model.dispose();
  });
});

describe('noise options', () => {
  it('are checked before training with the option named', () => {
    expect(resolveNoiseOptions(false)).toBeNull();
    expect(resolveNoiseOptions(undefined)!.budget).toBe(0.01);
    expect(() => resolveNoiseOptions({ budget: 2 })).toThrow(/noise.budget' must be a number > 0 and ≤ 1; received 2/);
    expect(() => resolveNoiseOptions({ minGroups: 2 })).toThrow(/noise.minGroups' must be an integer from 4 to 4096; received 2/);
    expect(() => resolveNoiseOptions({ minGroups: 16, maxGroups: 8 })).toThrow(/noise.maxGroups/);
    expect(() => resolveNoiseOptions({ evrey: 3 })).toThrow(/Unknown option 'noise.evrey'/);
    expect(() => resolveNoiseOptions({ x: 1 })).toThrow(/both x and y/);
  });
});
