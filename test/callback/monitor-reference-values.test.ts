/**
 * Published check values through the same code path that produces window statistics: gradients
 * are fed to the model's optimizer (learning rate 0, so they are exactly the gradients it sees),
 * the tap accumulates them, and the window record is read back.
 */
import { beforeAll, describe, expect, it } from 'vitest';
import { monitor, type Monitor } from '../../src/index.js';
import { gaussian, mulberry32 } from '../helpers/random.js';
import { tf, useCpu } from '../helpers/tf.js';

beforeAll(useCpu);

/** A model of bias-free single-input dense layers whose kernels have `widths` entries. */
function kernelModel(widths: number[]) {
  const model = tf.sequential();
  widths.forEach((units, i) => model.add(tf.layers.dense({ units, inputShape: [i === 0 ? 1 : widths[i - 1]!], useBias: false })));
  model.compile({ optimizer: tf.train.sgd(0), loss: 'meanSquaredError' });
  const vars = model.layers.map((l) => l.trainableWeights[0]!.read() as tf.Variable);
  const feed = (perLayer: number[][]) => {
    const map: Record<string, tf.Tensor> = {};
    vars.forEach((v, i) => {
      map[v.name] = tf.tensor(perLayer[i]!, v.shape);
    });
    model.optimizer.applyGradients(map);
    tf.dispose(Object.values(map));
  };
  return { model, vars, feed };
}

async function lastWindow(mon: Monitor) {
  await mon.flush();
  const ws = mon.windows();
  return ws[ws.length - 1]!;
}

describe('window statistics on published check values', () => {
  it('reproduce methods.md §1.5 row 3: K=4 gradients (1,2),(3,2),(1,4),(3,4) at B=32', async () => {
    // McCandlish et al. (2018), B_simple with the 1/K bias correction derived in methods.md §1.4 [computed].
    const { model, feed } = kernelModel([2]);
    const mon = await monitor(model, { window: 4, batchSize: 32, noise: false });
    for (const g of [[1, 2], [3, 2], [1, 4], [3, 4]]) feed([g]);
    const w = await lastWindow(mon);
    await mon.close();
    const s = w.layers[model.layers[0]!.name]!;
    expect(s.grad_mean_norm ** 2).toBeCloseTo(13, 9);
    expect(s.grad_std_norm ** 2).toBeCloseTo(8 / 3, 9);
    expect(s.grad_snr).toBeCloseTo(2.2079402166, 9);
    expect(s.grad_snr_db).toBeCloseTo(6.879746, 6);
    // The row's noise scale (6.9189189189) belongs to gradients at fixed weights: it is checked on the
    // measurement's estimator (test/analysis/fixed-weight-noise.test.ts); a window never reports one.
    expect(s.noise_scale).toBeNull();
    expect(w.noise).toBeUndefined();
    expect(w.snr_floor).toBeCloseTo(0.5, 12); // 1/sqrt(K) with K = 4
    expect(s.update_ratio).toBe(0); // learning rate 0
  });

  it('pool layers by the ratio of sums, methods.md §1.5 row 5: 110/25.1 = 4.3824701195', async () => {
    // Layer A: S = 100, |G|² = 25; layer B: S = 10, |G|² = 0.1 (McCandlish et al. 2018, §2 per-layer
    // aggregation as in methods.md §1.4) [computed]. With B = 1 and K = 2 gradients a ± d,
    // S = 2d² and |G|² = a² − d², so A: d² = 50, a² = 75 and B: d² = 5, a² = 5.1.
    const { model, feed } = kernelModel([1, 1]);
    const mon = await monitor(model, { window: 2, batchSize: 1, noise: false });
    const [aA, dA, aB, dB] = [Math.sqrt(75), Math.sqrt(50), Math.sqrt(5.1), Math.sqrt(5)];
    feed([[aA + dA], [aB + dB]]);
    feed([[aA - dA], [aB - dB]]);
    const w = await lastWindow(mon);
    await mon.close();
    const [la, lb] = model.layers.map((l) => w.layers[l.name]!);
    // Squared norms add over layers: ‖m‖² = a², Σs² = 2d² (ddof 1) per layer, and the network's are the sums
    // 75 + 5.1 and 100 + 10, the parts of the row's ratio of sums (float32 gradients: about 7 digits).
    expect(la!.grad_mean_norm ** 2).toBeCloseTo(75, 4);
    expect(lb!.grad_std_norm ** 2).toBeCloseTo(10, 4);
    expect(w.network.grad_mean_norm ** 2).toBeCloseTo(80.1, 4);
    expect(w.network.grad_std_norm ** 2).toBeCloseTo(110, 4);
  });

  it('give a known noise scale within 5% over many windows at fixed weights', async () => {
    // Synthetic minibatch gradients g = G + ξ/√B with per-example covariance Σ = σ²I:
    // B_simple = tr(Σ)/|G|² (McCandlish et al. 2018, §2 definition of B_simple).
    const d = 20;
    const B = 32;
    const sigma = 1;
    const G = Array.from({ length: d }, (_, j) => (j % 2 === 0 ? 0.5 : -0.5));
    const truth = (d * sigma * sigma) / G.reduce((a, g) => a + g * g, 0); // 20 / 5 = 4
    const { model, feed } = kernelModel([d]);
    const mon = await monitor(model, { window: 50, batchSize: B, noise: false });
    const rng = mulberry32(2024);
    for (let step = 0; step < 50 * 40; step++) {
      feed([G.map((g) => g + (sigma / Math.sqrt(B)) * gaussian(rng))]);
    }
    await mon.flush();
    // At fixed weights (learning rate 0) the window's own statistics give B_simple by methods.md §1.4:
    // B·Σs²/(‖m‖² − Σs²/K). (In training the weights move, and this formula fails: methods.md §10.)
    const values = mon.windows().map((w) => {
      const s = w.layers[model.layers[0]!.name]!;
      return (B * s.grad_std_norm ** 2) / (s.grad_mean_norm ** 2 - s.grad_std_norm ** 2 / w.batches);
    });
    await mon.close();
    expect(values.length).toBe(40);
    const sorted = values.slice().sort((a, b) => a - b);
    const median = (sorted[19]! + sorted[20]!) / 2;
    expect(Math.abs(median / truth - 1)).toBeLessThan(0.05);
  });

  it('read near the 1/sqrt(K) floor on pure noise (methods.md §1.5 row 7)', async () => {
    // G = 0: the raw SNR of K = 100 draws has median ≈ 0.10 [computed], not 0.
    const d = 50;
    const { model, feed } = kernelModel([d]);
    const mon = await monitor(model, { window: 100, batchSize: 16, noise: false });
    const rng = mulberry32(7);
    for (let step = 0; step < 100 * 31; step++) feed([Array.from({ length: d }, () => gaussian(rng))]);
    await mon.flush();
    const snrs = mon.windows().map((w) => w.layers[model.layers[0]!.name]!.grad_snr).sort((a, b) => a - b);
    const floor = mon.windows()[0]!.snr_floor;
    await mon.close();
    expect(snrs.length).toBe(31);
    expect(Math.abs(snrs[15]! / 0.1 - 1)).toBeLessThan(0.05);
    expect(floor).toBeCloseTo(0.1, 12);
  });
});
