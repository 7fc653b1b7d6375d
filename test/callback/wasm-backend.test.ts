/**
 * The same monitor on the wasm backend, where dataSync copies out of the wasm heap: the automatic
 * choice is the float64 JavaScript accumulator, training stays bit-identical, and the statistics
 * agree with the tensor-op path.
 */
import { beforeAll, describe, expect, it } from 'vitest';
import { readValues } from '../../src/callback/host-read.js';
import { JsAccumulator } from '../../src/callback/js-accumulator.js';
import { viewModel } from '../../src/callback/model-layers.js';
import { monitor } from '../../src/index.js';
import { blobTensors, denseModel, tf, useWasm, weightsOf } from '../helpers/tf.js';
import { expectTwoPass, feedSteps, twoPass } from '../helpers/two-pass.js';

beforeAll(async () => {
  expect(await useWasm()).toBe(true);
});

describe('monitor on the wasm backend', () => {
  it('copies gradient values into a reused buffer, equal to dataSync', () => {
    const t = tf.randomNormal([37, 5]);
    const buf = new Float32Array(t.size);
    const got = readValues(t, buf);
    expect(got).toBe(buf);
    expect(Array.from(buf)).toEqual(Array.from(t.dataSync()));
    t.dispose();
  });

  it('folds the gradients with the WebAssembly SIMD kernel, giving the float64 loop\'s numbers', async () => {
    // The same gradients through a kernel-backed accumulator (wasm) and through plain ShiftedMoments
    // sums computed here with the textbook two-pass formulas (mean, then squared deviations).
    const model = denseModel({ inputs: 6, hidden: [10], outputs: 3, seed: 5 });
    const view = viewModel(model);
    const acc = new JsAccumulator(view);
    expect(acc.folding).toBe('simd');
    const grads: Float32Array[][] = [];
    for (let k = 0; k < 9; k++) {
      const step = view.variables.map((v) => tf.randomNormal(v.variable.shape, k, 1 + k / 10, 'float32', 40 + k));
      grads.push(step.map((t) => Float32Array.from(t.dataSync())));
      acc.before(view.variables.map((v, i) => [v.variable.name, step[i]!] as const), false);
      acc.after(false);
      tf.dispose(step);
    }
    const out = await acc.close();
    view.variables.forEach((v, i) => {
      const want = twoPass(grads.map((g) => g[i]!), v.size);
      expect(out[i]!.count).toBe(9);
      expect(out[i]!.varianceTrace / want.varianceTrace).toBeCloseTo(1, 9);
      expect(out[i]!.meanSquaredNorm / want.meanSquaredNorm).toBeCloseTo(1, 9);
    });
    acc.dispose();
    model.dispose();
  });

  it('leaves out, in the kernel\'s one-call fold, only the steps of the layer whose gradient is not finite', async () => {
    // Eight steps (two blocks of four); step 5 of the first layer's kernel holds a NaN. That layer keeps
    // the other 7 steps, the output layer all 8, each equal to the two-pass formulas over what it kept.
    const model = denseModel({ inputs: 6, hidden: [10], outputs: 3, seed: 6 });
    const view = viewModel(model);
    const acc = new JsAccumulator(view);
    expect(acc.folding).toBe('simd');
    const kept = feedSteps(acc, view, 8, { seed: 70, mean: 0.5, bad: { step: 5, variable: 0 } });
    const out = await acc.close();
    expectTwoPass(out, view, kept, (i) => (i === 0 ? 1 : 0));
    expect(out.map((o) => o.count).sort()).toEqual([7, 7, 8, 8]);
    acc.dispose();
    model.dispose();
  });

  it('chooses the JavaScript accumulator and leaves training bit-identical', async () => {
    expect(tf.getBackend()).toBe('wasm');
    const plain = denseModel({ inputs: 6, hidden: [10], outputs: 3, seed: 8 });
    const watched = denseModel({ inputs: 6, hidden: [10], outputs: 3, seed: 8 });
    const { xs, ys } = blobTensors(160, 6, 3);
    await plain.fit(xs, ys, { epochs: 2, batchSize: 16, shuffle: false, verbose: 0 });
    const mon = await monitor(watched, { window: 4 });
    expect(mon.accumulator).toBe('js');
    await watched.fit(xs, ys, { epochs: 2, batchSize: 16, shuffle: false, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    expect(mon.windows().length).toBe(5);
    const a = await weightsOf(plain);
    const b = await weightsOf(watched);
    for (let i = 0; i < a.length; i++) expect(Buffer.from(b[i]!.buffer).equals(Buffer.from(a[i]!.buffer))).toBe(true);
    tf.dispose([xs, ys]);
  });

  it('agrees with the tensor-op accumulator to 1e-4', async () => {
    const run = async (accumulator: 'js' | 'tensor') => {
      const model = denseModel({ inputs: 6, hidden: [10], outputs: 3, seed: 9 });
      const { xs, ys } = blobTensors(160, 6, 3);
      const mon = await monitor(model, { window: 5, accumulator });
      await model.fit(xs, ys, { epochs: 2, batchSize: 16, shuffle: false, verbose: 0, callbacks: [mon.callback] });
      await mon.close();
      tf.dispose([xs, ys]);
      return mon.windows().map((w) => w.network);
    };
    const a = await run('js');
    const b = await run('tensor');
    expect(b.length).toBe(a.length);
    a.forEach((x, i) => {
      const y = b[i]!;
      for (const f of ['grad_mean_norm', 'grad_std_norm', 'weight_travel'] as const) {
        expect(Math.abs(y[f] - x[f]) / x[f]).toBeLessThan(1e-4);
      }
      // Consecutive differences are paired within the same blocks on both paths.
      expect(Math.abs(y.grad_diff_norm! - x.grad_diff_norm!) / x.grad_diff_norm!).toBeLessThan(1e-4);
    });
  });
});
