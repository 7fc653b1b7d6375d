/**
 * Runs only through `npm run test:tfjs-node`, on a machine where @tensorflow/tfjs-node is installed
 * (our CI machines cannot install it: its install script downloads libtensorflow from outside the
 * npm registry). It checks the monitor on the native backend the way the wasm test does.
 */
import { describe, expect, it } from 'vitest';
import { monitor } from '../../src/index.js';
import { blobTensors, denseModel, tf, weightsOf } from '../helpers/tf.js';

describe('monitor on the tfjs-node backend', () => {
  it('uses the JavaScript accumulator and leaves training bit-identical', async () => {
    const pkg = '@tensorflow/tfjs-node';
    await import(pkg).catch(() => {
      throw new Error('@tensorflow/tfjs-node is not installed here; install it to run this check.');
    });
    expect(await tf.setBackend('tensorflow')).toBe(true);
    const plain = denseModel({ inputs: 6, hidden: [10], outputs: 3, seed: 8 });
    const watched = denseModel({ inputs: 6, hidden: [10], outputs: 3, seed: 8 });
    const { xs, ys } = blobTensors(160, 6, 3);
    const before = tf.memory().numTensors;
    await plain.fit(xs, ys, { epochs: 2, batchSize: 16, shuffle: false, verbose: 0 });
    const mon = await monitor(watched, { window: 4 });
    expect(mon.accumulator).toBe('js');
    await watched.fit(xs, ys, { epochs: 2, batchSize: 16, shuffle: false, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    expect(mon.windows().length).toBe(5);
    const a = await weightsOf(plain);
    const b = await weightsOf(watched);
    for (let i = 0; i < a.length; i++) expect(Buffer.from(b[i]!.buffer).equals(Buffer.from(a[i]!.buffer))).toBe(true);
    expect(tf.memory().numTensors).toBe(before);
    tf.dispose([xs, ys]);
  });
});
