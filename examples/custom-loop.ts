/**
 * A hand-written training loop (no `fit`) with tidemark attached. The monitor taps the model's
 * optimizer, so every `optimizer.minimize(...)` call is one minibatch in its statistics; without fit
 * there are no batch logs, so the batch size is given in the options (the noise scale needs it) and
 * windows are a fixed number of steps.
 *
 *   npx tsx examples/custom-loop.ts [--passes N] [--seed N]
 *
 * `--passes` counts steps in units of one data set's worth of examples (50 steps of 64 out of 3200).
 */
import { parseArgs } from 'node:util';
import * as tf from '@tensorflow/tfjs';
import { monitor, type WindowRecord } from '../src/index.js';
import { buildGearboxModel, makeGearboxData, mulberry32, toTensors } from './gearbox-data.js';

const BATCH_SIZE = 64;
const SAMPLES = 3200;
const WINDOW_STEPS = 25;

const { values } = parseArgs({ options: { passes: { type: 'string' }, seed: { type: 'string' } }, strict: true });
const passes = Number(values.passes ?? 20);
const seed = Number(values.seed ?? 1);
if (!Number.isInteger(passes) || passes < 1) throw new RangeError(`--passes must be a positive integer, received ${values.passes}`);
if (!Number.isInteger(seed) || seed < 0) throw new RangeError(`--seed must be a non-negative integer, received ${values.seed}`);

await tf.setBackend('cpu');
const data = makeGearboxData({ samples: SAMPLES, seed });
const { xs, ys } = toTensors(tf, data);
const model = buildGearboxModel(tf, { seed, learningRate: 0.02 });
const optimizer = model.optimizer;
const variables = model.trainableWeights.map((w) => w.read() as tf.Variable);
const tensorsBefore = tf.memory().numTensors;

const mon = await monitor(model, { run: 'gearbox-custom-loop', window: WINDOW_STEPS, batchSize: BATCH_SIZE });

// Losses come from our own loop here, not from fit's logs, so keep a running mean per window.
let lossSum = 0;
let lossCount = 0;
const layerNames = model.layers.map((l) => l.name);
console.log(
  `custom loop: ${passes} passes over ${SAMPLES} measurements, batch ${BATCH_SIZE}, windows of ${WINDOW_STEPS} steps`,
);
console.log(`${'steps'.padEnd(12)}${'loss'.padStart(8)}${'floor dB'.padStart(10)}  SNR dB: ${layerNames.join(' | ')} | network`);
mon.onWindow((w: WindowRecord) => {
  const loss = lossCount > 0 ? lossSum / lossCount : Number.NaN;
  lossSum = 0;
  lossCount = 0;
  const snr = [...layerNames.map((n) => w.layers[n]?.grad_snr_db ?? Number.NaN), w.network.grad_snr_db];
  console.log(
    `${`${w.first_step}-${w.step}`.padEnd(12)}${loss.toFixed(4).padStart(8)}` +
      `${(20 * Math.log10(w.snr_floor)).toFixed(1).padStart(10)}  ` +
      snr.map((v) => v.toFixed(1).padStart(6)).join(' '),
  );
});

// Each minibatch is drawn independently (no epochs), which is what the window's 1/sqrt(K) floor assumes;
// a loop that walks shuffled passes would sit below that floor in diffusion (methods.md §1.4).
const rand = mulberry32(seed + 1000);
const stepsPerPass = Math.ceil(SAMPLES / BATCH_SIZE);
for (let step = 0; step < passes * stepsPerPass; step++) {
  const picked = Array.from({ length: BATCH_SIZE }, () => Math.floor(rand() * SAMPLES));
  const [xb, yb] = tf.tidy(() => {
    const idx = tf.tensor1d(picked, 'int32');
    return [tf.gather(xs, idx), tf.gather(ys, idx)];
  });
  // minimize() disposes the forward pass and the gradients itself; only the returned cost is ours.
  const cost = optimizer.minimize(
    () => tf.metrics.categoricalCrossentropy(yb, model.apply(xb, { training: true }) as tf.Tensor).mean() as tf.Scalar,
    true,
    variables,
  );
  xb.dispose();
  yb.dispose();
  if (cost) {
    // Read before adding: a window closing during the await resets the running sum.
    const value = (await cost.data())[0] ?? Number.NaN;
    cost.dispose();
    lossSum += value;
    lossCount++;
  }
}

await mon.close();
const tensorsAfter = tf.memory().numTensors;
xs.dispose();
ys.dispose();
console.log(
  `${mon.windows().length} windows from ${passes * stepsPerPass} minimize() calls; ` +
    `live tensors ${tensorsBefore} before the loop, ${tensorsAfter} after it`,
);
console.log('These are statistical estimates; confirm any decision to stop training on held-out data.');
