/**
 * What the activation probe costs: per call at 512, 2048 and 4096 probe rows on the reference model,
 * split into the forward pass with read-back, the binned estimates, the pairwise bounds and the linear
 * read-outs; and as a share of training time at the default cadence, measured side by side with the same
 * monitor without a probe.
 *
 *   npx tsx bench/probe.ts            # about two minutes
 *   npx tsx bench/probe.ts --quick    # fewer repetitions and epochs
 *
 * cpu backend. Target: the probe adds ≤ 3 % (its default budget) to training time at default settings. Prints tables;
 * asserts nothing; exits 0.
 */
import { parseArgs } from 'node:util';
import * as tf from '@tensorflow/tfjs';
import { monitor } from '../src/index.js';
import { viewModel } from '../src/callback/model-layers.js';
import { Probe, PROBE_DEFAULTS, resolveProbeOptions } from '../src/callback/probe.js';
import { BATCH, buildReferenceModel, CLASSES, DATA_SEED, FEATURES, SAMPLES } from './reference-model.js';
import { median, printTable, progress } from './report.js';
import { teacherData } from './seeded-data.js';

const TARGET = 0.03;
const { values } = parseArgs({ options: { quick: { type: 'boolean', default: false } } });
const quick = values.quick === true;


const fmt = (ms: number): string => (ms >= 100 ? ms.toFixed(0) : ms.toFixed(1));

await tf.setBackend('cpu');
await tf.ready();

const data = teacherData(SAMPLES, FEATURES, CLASSES, DATA_SEED);
const x = tf.tensor2d(data.x, [SAMPLES, FEATURES]);
const y = tf.tensor2d(data.y, [SAMPLES, CLASSES]);

// ---------------------------------------------------------------------------------------------
// 1. Cost per call

/** Median timings of one probe call (after one warm-up call), from the probe's own clock. */
async function perCall(rows: number, boundRows: number, reps: number): Promise<{ forward: number; binned: number; bounds: number; linear: number; total: number }> {
  const model = buildReferenceModel();
  const px = x.slice([0, 0], [rows, FEATURES]);
  const py = y.slice([0, 0], [rows, CLASSES]);
  const probe = new Probe(model, viewModel(model), resolveProbeOptions({ x: px, y: py, boundRows, size: rows })!);
  const t: { forward: number[]; binned: number[]; bounds: number[]; linear: number[]; total: number[] } = { forward: [], binned: [], bounds: [], linear: [], total: [] };
  for (let r = 0; r < reps + 1; r++) {
    const m = await probe.measure();
    if (r === 0) continue;
    t.forward.push(m.timing.forward);
    t.binned.push(m.timing.binned);
    t.bounds.push(m.timing.bounds);
    t.linear.push(m.timing.linear);
    t.total.push(m.ms);
  }
  probe.dispose();
  tf.dispose([px, py]);
  model.dispose();
  return { forward: median(t.forward), binned: median(t.binned), bounds: median(t.bounds), linear: median(t.linear), total: median(t.total) };
}

const reps = quick ? 3 : 7;
const callRows: string[][] = [];
for (const rows of [512, 2048, 4096]) {
  progress(`probe call at ${rows} rows`);
  const d = await perCall(rows, PROBE_DEFAULTS.boundRows, reps);
  const all = await perCall(rows, rows, quick ? 1 : 3);
  callRows.push([String(rows), fmt(d.forward), fmt(d.binned), fmt(d.bounds), fmt(d.linear), fmt(d.total), fmt(all.bounds), fmt(all.total)]);
}
printTable(
  'Table 1. One probe call on the reference model (5 layers, 292 units), cpu backend, median ms',
  ['probe rows', 'forward + read', 'binned + act stats', `bounds (${PROBE_DEFAULTS.boundRows} rows)`, `linear (${PROBE_DEFAULTS.linearRows} rows)`, 'total (default)', 'bounds on all rows', 'total'],
  callRows,
  [
    `The pairwise bounds cost O(rows² · units); by default they use at most ${PROBE_DEFAULTS.boundRows} rows (probe.boundRows),`,
    'so their cost stops growing past that; the last two columns are with the bounds on every row (boundRows = rows).',
    `linear: the cross-fitted softmax read-out per layer (lower bound on I(T;Y)) on at most ${PROBE_DEFAULTS.linearRows} rows (probe.linearRows).`,
  ],
);

// ---------------------------------------------------------------------------------------------
// 2. Share of training time at the default cadence

async function trainSeconds(every: number | 'auto' | null, epochs: number): Promise<{ s: number; probes: number; probeMs: number }> {
  const model = buildReferenceModel();
  const mon = await monitor(model, {
    store: 'memory',
    ...(every !== null ? { probe: { x, y, every } } : {}),
    onWarning: () => {},
  });
  const t0 = performance.now();
  await model.fit(x, y, { epochs, batchSize: BATCH, shuffle: false, verbose: 0, callbacks: [mon.callback] });
  const s = (performance.now() - t0) / 1000;
  const probes = mon.windows().filter((w) => Object.values(w.layers)[0]!.mi_input !== undefined).length;
  const probeMs = mon.probeCost()?.ms ?? 0;
  await mon.close();
  model.dispose();
  return { s, probes, probeMs };
}

const shareRows: string[][] = [];
for (const epochs of quick ? [10] : [10, 40]) {
  const rounds = quick ? 2 : 3;
  const arms: (number | 'auto' | null)[] = [null, 'auto', 5];
  const times = new Map<number | 'auto' | null, number[]>(arms.map((a) => [a, []]));
  const probes = new Map<number | 'auto' | null, number>();
  const shares = new Map<number | 'auto' | null, number[]>(arms.map((a) => [a, []]));
  for (let r = 0; r < rounds; r++) {
    progress(`training ${epochs} epochs, round ${r + 1} of ${rounds}`);
    // Rotate the order so drift in the machine's speed falls on every arm.
    for (let i = 0; i < arms.length; i++) {
      const arm = arms[(i + r) % arms.length]!;
      const t = await trainSeconds(arm, epochs);
      times.get(arm)!.push(t.s);
      probes.set(arm, t.probes);
      shares.get(arm)!.push(t.probeMs / (t.s * 1000));
    }
  }
  const base = median(times.get(null)!);
  for (const arm of arms.slice(1)) {
    const added = median(times.get(arm)!) / base - 1;
    const own = median(shares.get(arm)!);
    const isDefault = arm === 'auto';
    shareRows.push([
      String(epochs),
      String(epochs * (SAMPLES / BATCH)),
      arm === 'auto' ? "'auto' (default)" : `${arm} windows`,
      String(probes.get(arm)),
      base.toFixed(2),
      median(times.get(arm)!).toFixed(2),
      `${(added * 100).toFixed(1)} %`,
      `${(own * 100).toFixed(2)} %`,
      isDefault ? (own <= TARGET ? 'PASS' : 'OVER') : '',
    ]);
  }
}
printTable(
  `Table 2. Training the reference model with the monitor, without and with the probe (a set of ${SAMPLES} rows, default size ${PROBE_DEFAULTS.size}, bins, boundRows, linearRows), cpu, median s`,
  ['epochs', 'steps', 'probe every', 'probes', 'no probe', 'with probe', 'added (wall)', 'probe share (own clock)', `≤ ${TARGET * 100} %`],
  shareRows,
  [
    `'auto' probes the first window, then whenever the probing time stays within ${PROBE_DEFAULTS.budget * 100} % of the training time so far.`,
    "A fixed 'every: 5' is shown for comparison: window 'auto' (8 steps growing ×1.25 to an epoch of 128 steps) makes",
    'it probe often in the first epoch and every 5 epochs later, whatever a probe costs.',
    "'added (wall)' compares medians of separate trainings and swings by ±10 % on a shared machine; 'probe share' is the",
    "probes' own time (mon.probeCost()) over the same training's wall time, the figure the target is checked on. The",
    'warm-up probe at monitor() happens before training and is in neither.',
  ],
);
tf.dispose([x, y]);
