/**
 * What the phase analysis costs per window, next to one training step of the reference model.
 *
 *   npx tsx bench/analysis.ts            # about half a minute
 *   npx tsx bench/analysis.ts --quick    # fewer repetitions
 *
 * Per window the monitor will call PhaseDetector.update, take a snapshot and call StopAdvisor.update.
 * That is timed here on synthetic windows (test/helpers/snr-series.ts: 'auto' windows capped at an epoch
 * of 128 steps, each layer's SNR sliding from about +4 dB to −25 dB over a decade of steps, crossing 0 dB
 * at its own step, 1.5 dB noise and 3 % outliers) for 10 and 100 layers. The training step is
 * `model.trainOnBatch` of the reference model (dense 32→64→128→64→32→4, tanh, softmax, SGD lr 0.05,
 * batch 32, cpu backend, the seeded teacher data of bench/seeded-data.ts), without the monitor.
 * Target: analysis per window < 1 % of one step. Prints a table; asserts nothing; exits 0.
 */
import { parseArgs } from 'node:util';
import * as tf from '@tensorflow/tfjs';
import { PhaseDetector } from '../src/analysis/phase-detector.js';
import { StopAdvisor } from '../src/analysis/stop-advice.js';
import type { PhaseInput } from '../src/analysis/phase-detector.js';
import { logUniform, snrSeries, spreadDrop, type LayerSpec } from '../test/helpers/snr-series.js';
import { mulberry32 } from '../test/helpers/random.js';
import { BATCH, buildReferenceModel, CLASSES, DATA_SEED, FEATURES, SAMPLES } from './reference-model.js';
import { median } from './report.js';
import { teacherData } from './seeded-data.js';

const TARGET = 0.01;
const WINDOWS = 300;

const { values } = parseArgs({ options: { quick: { type: 'boolean', default: false } } });
const quick = values.quick === true;
const ROUNDS = quick ? 3 : 7;
const STEPS = 200;
const WARMUP = 20;


// ---------------------------------------------------------------------------------------------
// One training step of the reference model

/** Median ms per trainOnBatch over STEPS steps after WARMUP steps, per round; returns the per-round medians. */
async function stepTimes(): Promise<number[]> {
  const data = teacherData(SAMPLES, FEATURES, CLASSES, DATA_SEED);
  const x = tf.tensor2d(data.x, [SAMPLES, FEATURES]);
  const y = tf.tensor2d(data.y, [SAMPLES, CLASSES]);
  const perBatch = SAMPLES / BATCH;
  const xs = Array.from({ length: perBatch }, (_, b) => x.slice([b * BATCH, 0], [BATCH, FEATURES]));
  const ys = Array.from({ length: perBatch }, (_, b) => y.slice([b * BATCH, 0], [BATCH, CLASSES]));
  const rounds: number[] = [];
  for (let r = 0; r < ROUNDS; r++) {
    const model = buildReferenceModel();
    const times: number[] = [];
    for (let s = 0; s < WARMUP + STEPS; s++) {
      const b = s % perBatch;
      const t0 = performance.now();
      await model.trainOnBatch(xs[b]!, ys[b]!);
      const dt = performance.now() - t0;
      if (s >= WARMUP) times.push(dt);
    }
    rounds.push(median(times));
    model.dispose();
  }
  for (const t of [...xs, ...ys, x, y]) t.dispose();
  return rounds;
}

// ---------------------------------------------------------------------------------------------
// The analysis per window

function syntheticWindows(layers: number): PhaseInput[] {
  const rng = mulberry32(4242 + layers);
  const specs: LayerSpec[] = Array.from({ length: layers }, (_, i) => ({
    name: `dense_Dense${i + 1}`,
    params: 1000 + Math.floor(10_000 * rng()),
    profile: spreadDrop(logUniform(rng, 400, 4000), 3 + 2 * rng(), -27 + 4 * rng()),
  }));
  return snrSeries({ windows: WINDOWS, stepsPerEpoch: 128, noiseDb: 1.5, seed: layers, layers: specs }).windows;
}

/** µs per window for PhaseDetector.update + snapshot + StopAdvisor.update, per repetition. */
function analysisTimes(windows: PhaseInput[], reps: number): number[] {
  const logs = windows.map((w, i) => ({ step: w.step, logs: { loss: 1 / Math.sqrt(i + 1), val_loss: 1.1 / Math.sqrt(i + 1) } }));
  const out: number[] = [];
  for (let r = 0; r < reps; r++) {
    const det = new PhaseDetector();
    const adv = new StopAdvisor();
    const t0 = performance.now();
    for (let i = 0; i < windows.length; i++) {
      det.update(windows[i]!);
      adv.update(logs[i]!, det.snapshot());
    }
    out.push(((performance.now() - t0) * 1000) / windows.length);
  }
  return out;
}

async function main(): Promise<void> {
  await tf.setBackend('cpu');
  await tf.ready();
  const reps = quick ? 20 : 60;
  const cost = new Map<number, number[]>();
  for (const layers of [10, 100]) {
    const w = syntheticWindows(layers);
    analysisTimes(w, 5); // warm up the JIT
    cost.set(layers, analysisTimes(w, reps));
  }
  const steps = await stepTimes();
  const step = median(steps);
  const pad = (s: string, n: number): string => s.padStart(n);
  console.log(`Phase analysis per window vs one training step (cpu backend, tfjs ${tf.version.tfjs}, node ${process.version})`);
  console.log(`reference step: median ${step.toFixed(3)} ms (per-round medians ${steps.map((s) => s.toFixed(2)).join(', ')}; ${ROUNDS} rounds × ${STEPS} steps)`);
  console.log('');
  console.log(`${pad('layers', 7)} ${pad('µs/window (median)', 19)} ${pad('range', 15)} ${pad('step ms', 8)} ${pad('% of step', 10)}  target < ${TARGET * 100}%`);
  for (const [layers, times] of cost) {
    const us = median(times);
    const ratio = us / 1000 / step;
    console.log(
      `${pad(String(layers), 7)} ${pad(us.toFixed(2), 19)} ${pad(`${Math.min(...times).toFixed(1)}–${Math.max(...times).toFixed(1)}`, 15)} ${pad(step.toFixed(3), 8)} ${pad((ratio * 100).toFixed(3), 10)}  ${ratio < TARGET ? 'PASS' : 'OVER'}`,
    );
  }
  console.log('');
  console.log(`${WINDOWS} windows per repetition, ${reps} repetitions; µs/window = (PhaseDetector.update + snapshot + StopAdvisor.update) / windows.`);
}

await main();
