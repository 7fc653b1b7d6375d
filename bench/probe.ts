/**
 * What the activation probe costs: per call at 512, 2048 and 4096 probe rows on the reference model,
 * split into the forward pass with read-back, the binned estimates and the pairwise bounds; and as a
 * share of training time at the default cadence, measured side by side with the same monitor without
 * a probe.
 *
 *   npx tsx bench/probe.ts            # about two minutes
 *   npx tsx bench/probe.ts --quick    # fewer repetitions and epochs
 *
 * cpu backend. Target: the probe adds ≤ 5 % to training time at default settings. Prints tables;
 * asserts nothing; exits 0.
 */
import { parseArgs } from 'node:util';
import * as tf from '@tensorflow/tfjs';
import { monitor } from '../src/index.js';
import { viewModel } from '../src/callback/model-layers.js';
import { Probe, PROBE_DEFAULTS, resolveProbeOptions } from '../src/callback/probe.js';
import { BATCH, buildReferenceModel, CLASSES, DATA_SEED, FEATURES, SAMPLES } from './reference-model.js';
import { printTable, progress } from './report.js';
import { teacherData } from './seeded-data.js';

const TARGET = 0.05;
const { values } = parseArgs({ options: { quick: { type: 'boolean', default: false } } });
const quick = values.quick === true;

function median(xs: number[]): number {
  const s = xs.slice().sort((a, b) => a - b);
  const m = s.length >> 1;
  return s.length % 2 === 1 ? s[m]! : (s[m - 1]! + s[m]!) / 2;
}

const fmt = (ms: number): string => (ms >= 100 ? ms.toFixed(0) : ms.toFixed(1));

await tf.setBackend('cpu');
await tf.ready();

const data = teacherData(SAMPLES, FEATURES, CLASSES, DATA_SEED);
const x = tf.tensor2d(data.x, [SAMPLES, FEATURES]);
const y = tf.tensor2d(data.y, [SAMPLES, CLASSES]);

// ---------------------------------------------------------------------------------------------
// 1. Cost per call

async function perCall(rows: number, boundRows: number, reps: number): Promise<number> {
  const model = buildReferenceModel();
  const px = x.slice([0, 0], [rows, FEATURES]);
  const py = y.slice([0, 0], [rows, CLASSES]);
  const probe = new Probe(model, viewModel(model), resolveProbeOptions({ x: px, y: py, boundRows })!);
  const times: number[] = [];
  for (let r = 0; r < reps + 1; r++) {
    const t = (await probe.measure()).ms;
    if (r > 0) times.push(t);
  }
  probe.dispose();
  tf.dispose([px, py]);
  model.dispose();
  return median(times);
}

async function forwardOnly(rows: number, reps: number): Promise<number> {
  const model = buildReferenceModel();
  const px = x.slice([0, 0], [rows, FEATURES]);
  const view = tf.model({ inputs: model.inputs, outputs: model.layers.map((l) => l.output as tf.SymbolicTensor) });
  const times: number[] = [];
  for (let r = 0; r < reps + 1; r++) {
    const t0 = performance.now();
    const outs = tf.tidy(() => view.predict(px, { batchSize: 512 }) as tf.Tensor[]);
    for (const o of outs) await o.data();
    tf.dispose(outs);
    if (r > 0) times.push(performance.now() - t0);
  }
  px.dispose();
  model.dispose();
  return median(times);
}

const reps = quick ? 3 : 7;
const callRows: string[][] = [];
for (const rows of [512, 2048, 4096]) {
  progress(`probe call at ${rows} rows`);
  const fwd = await forwardOnly(rows, reps);
  const binned = await perCall(rows, 0, reps);
  const full = await perCall(rows, PROBE_DEFAULTS.boundRows, reps);
  const all = await perCall(rows, rows, quick ? 1 : 3);
  callRows.push([String(rows), fmt(fwd), fmt(binned - fwd), fmt(full - binned), fmt(full), fmt(all)]);
}
printTable(
  'Table 1. One probe call on the reference model (5 layers, 292 units), cpu backend, median ms',
  ['probe rows', 'forward + read', 'binned (all layers)', `bounds (${PROBE_DEFAULTS.boundRows} rows)`, 'default total', 'bounds on all rows'],
  callRows,
  [
    `The pairwise bounds cost O(rows² · units); by default they use at most ${PROBE_DEFAULTS.boundRows} rows (probe.boundRows),`,
    'so their cost stops growing past that; the last column is the total with the bounds on every row.',
  ],
);

// ---------------------------------------------------------------------------------------------
// 2. Share of training time at the default cadence

async function trainSeconds(withProbe: boolean, epochs: number): Promise<{ s: number; probes: number }> {
  const model = buildReferenceModel();
  const mon = await monitor(model, {
    store: 'memory',
    ...(withProbe ? { probe: { x, y } } : {}),
    onWarning: () => {},
  });
  const t0 = performance.now();
  await model.fit(x, y, { epochs, batchSize: BATCH, shuffle: false, verbose: 0, callbacks: [mon.callback] });
  const s = (performance.now() - t0) / 1000;
  const probes = mon.windows().filter((w) => Object.values(w.layers)[0]!.mi_input !== undefined).length;
  await mon.close();
  model.dispose();
  return { s, probes };
}

const shareRows: string[][] = [];
for (const epochs of quick ? [10] : [10, 40]) {
  const rounds = quick ? 2 : 3;
  const base: number[] = [];
  const probed: number[] = [];
  let probes = 0;
  for (let r = 0; r < rounds; r++) {
    progress(`training ${epochs} epochs, round ${r + 1} of ${rounds}`);
    // Alternate the order so drift in the machine's speed falls on both arms.
    const a = r % 2 === 0 ? await trainSeconds(false, epochs) : await trainSeconds(true, epochs);
    const b = r % 2 === 0 ? await trainSeconds(true, epochs) : await trainSeconds(false, epochs);
    const [off, on] = r % 2 === 0 ? [a, b] : [b, a];
    base.push(off.s);
    probed.push(on.s);
    probes = on.probes;
  }
  const share = median(probed) / median(base) - 1;
  shareRows.push([
    String(epochs),
    String(epochs * (SAMPLES / BATCH)),
    String(probes),
    median(base).toFixed(2),
    median(probed).toFixed(2),
    `${(share * 100).toFixed(1)} %`,
    share <= TARGET ? 'PASS' : 'OVER',
  ]);
}
printTable(
  `Table 2. Training the reference model with the monitor, without and with the probe (${SAMPLES} rows, default every/size/bins/boundRows), cpu, median s`,
  ['epochs', 'steps', 'probes', 'no probe', 'with probe', 'added', `≤ ${TARGET * 100} %`],
  shareRows,
  [
    "window 'auto' (8 steps growing ×1.25 to an epoch of 128 steps), so the probe runs often in the first epoch and every",
    `${PROBE_DEFAULTS.every} epochs later: its share falls as the run gets longer.`,
  ],
);
tf.dispose([x, y]);
