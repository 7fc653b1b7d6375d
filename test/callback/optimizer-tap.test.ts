import { afterEach, beforeAll, describe, expect, it } from 'vitest';
import { installTap, isTapped, type GradientPair } from '../../src/callback/optimizer-tap.js';
import { monitor } from '../../src/index.js';
import { blobTensors, denseModel, tf, useCpu, weightsOf } from '../helpers/tf.js';

beforeAll(useCpu);

const opened: { close(): Promise<void> }[] = [];
afterEach(async () => {
  for (const m of opened.splice(0)) await m.close();
});

function listener(seen: GradientPair[][]) {
  return {
    before: (g: readonly GradientPair[]) => void seen.push(g.slice()),
    after: () => {},
    onError: (e: unknown) => {
      throw e;
    },
  };
}

describe('optimizer tap', () => {
  it('leaves the weights bit-identical after training with shuffle off', async () => {
    for (const optimizer of ['sgd', 'adam'] as const) {
      const make = () =>
        denseModel({
          inputs: 6,
          hidden: [12, 8],
          outputs: 3,
          seed: 11,
          optimizer: optimizer === 'sgd' ? tf.train.sgd(0.1) : tf.train.adam(0.01),
        });
      const plain = make();
      const watched = make();
      const start = await weightsOf(plain);
      expect(await weightsOf(watched)).toEqual(start);
      const { xs, ys } = blobTensors(200, 6, 3);
      await plain.fit(xs, ys, { epochs: 3, batchSize: 16, shuffle: false, verbose: 0 });
      const mon = await monitor(watched, { window: 4 });
      await watched.fit(xs, ys, { epochs: 3, batchSize: 16, shuffle: false, verbose: 0, callbacks: [mon.callback] });
      await mon.close();
      expect(mon.windows().length).toBeGreaterThan(5);
      const a = await weightsOf(plain);
      const b = await weightsOf(watched);
      expect(b.length).toBe(a.length);
      for (let i = 0; i < a.length; i++) expect(Buffer.from(b[i]!.buffer).equals(Buffer.from(a[i]!.buffer))).toBe(true);
      // The runs really trained: weights moved from the start.
      expect(a[0]).not.toEqual(start[0]);
      tf.dispose([xs, ys]);
    }
  });

  it('sees a custom loop that calls minimize on the optimizer', async () => {
    const model = denseModel({ inputs: 4, hidden: [5], outputs: 2, seed: 3 });
    const seen: GradientPair[][] = [];
    const remove = installTap(model.optimizer, listener(seen));
    const { xs, ys } = blobTensors(32, 4, 2);
    for (let i = 0; i < 3; i++) {
      model.optimizer.minimize(() => tf.losses.softmaxCrossEntropy(ys, model.predict(xs) as tf.Tensor) as tf.Scalar);
    }
    remove();
    expect(seen.length).toBe(3);
    const names = seen[0]!.map(([n]) => n).sort();
    const expected = model.trainableWeights.map((w) => (w.read() as tf.Variable).name).sort();
    expect(names).toEqual(expected);
    tf.dispose([xs, ys]);
  });

  it('installs once per optimizer and restores the original method when the last listener leaves', () => {
    const model = denseModel({ inputs: 2, hidden: [], outputs: 2 });
    const opt = model.optimizer;
    const original = opt.applyGradients;
    expect(Object.prototype.hasOwnProperty.call(opt, 'applyGradients')).toBe(false);
    const seenA: GradientPair[][] = [];
    const seenB: GradientPair[][] = [];
    const a = listener(seenA);
    const removeA = installTap(opt, a);
    const removeA2 = installTap(opt, a);
    const tapped = opt.applyGradients;
    const removeB = installTap(opt, listener(seenB));
    expect(opt.applyGradients).toBe(tapped);
    const v = model.trainableWeights[0]!.read() as tf.Variable;
    opt.applyGradients({ [v.name]: tf.zerosLike(v) });
    expect(seenA.length).toBe(1);
    expect(seenB.length).toBe(1);
    removeA();
    removeA2();
    expect(isTapped(opt)).toBe(true);
    removeB();
    expect(isTapped(opt)).toBe(false);
    expect(Object.prototype.hasOwnProperty.call(opt, 'applyGradients')).toBe(false);
    expect(opt.applyGradients).toBe(original);
  });

  it('is removed by close() after fit threw', async () => {
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const { xs, ys } = blobTensors(64, 4, 2);
    const mon = await monitor(model, { window: 2 });
    const boom = {
      onBatchEnd: async (batch: number) => {
        if (batch === 5) throw new Error('user callback failed');
      },
    };
    await expect(
      model.fit(xs, ys, { epochs: 2, batchSize: 4, verbose: 0, callbacks: [mon.callback, boom] }),
    ).rejects.toThrow('user callback failed');
    expect(isTapped(model.optimizer)).toBe(true);
    await mon.close();
    expect(isTapped(model.optimizer)).toBe(false);
    expect(Object.prototype.hasOwnProperty.call(model.optimizer, 'applyGradients')).toBe(false);
    // Training after close is untouched and unseen.
    await model.fit(xs, ys, { epochs: 1, batchSize: 4, verbose: 0 });
    expect(mon.windows().every((w) => w.step <= 6)).toBe(true);
    tf.dispose([xs, ys]);
  });

  it('keeps two monitors on one model independent', async () => {
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const { xs, ys } = blobTensors(64, 4, 2);
    const a = await monitor(model, { window: 4 });
    const b = await monitor(model, { window: 8 });
    opened.push(a, b);
    await model.fit(xs, ys, { epochs: 1, batchSize: 4, verbose: 0, callbacks: [a.callback, b.callback] });
    expect(a.windows().length).toBe(4);
    expect(b.windows().length).toBe(2);
    await a.close();
    expect(isTapped(model.optimizer)).toBe(true);
    await b.close();
    expect(isTapped(model.optimizer)).toBe(false);
    tf.dispose([xs, ys]);
  });
});
