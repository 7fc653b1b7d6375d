/**
 * Phases on real training that do not depend on the batch size. Data: handwritten digits of the `mnist`
 * package (seeded stratified split, 3,000 training rows); dense 784→64→32→10 relu, softmax, plain SGD; wasm
 * backend; default monitor options.
 *
 * Checks (sources beside each):
 * - Batch size 32 at lr 0.01 and batch size 128 at lr 0.04 (the learning rate scaled linearly with the batch:
 *   Goyal et al. 2017, "Accurate, Large Minibatch SGD: Training ImageNet in 1 Hour"; Smith & Le 2018, "A
 *   Bayesian Perspective on Generalization and Stochastic Gradient Descent", noise scale g ≈ εN/B; both from
 *   memory) follow the same path per epoch, so the network's diffusion-start must fall within a factor 1.5 in
 *   epochs, and both runs must begin in drift.
 * - At lr 0.01, batch 32: a drift phase first, and the network's diffusion-start within a factor 2 of the knee
 *   of the training loss per epoch, found by Kneedle (Satopää, Albrecht, Irwin & Raghavan 2011, "Finding a
 *   'Kneedle' in a Haystack: Detecting Knee Points in System Behavior", ICDCS workshops): both axes normalised to
 *   [0, 1], the knee is the point farthest below the chord from the first to the last point of a decreasing
 *   convex curve.
 */
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import { monitor } from '../../src/index.js';
import type { Marker, WindowRecord } from '../../src/protocol/records.js';
import { mnistModel, mnistSplit, mnistTensors } from '../helpers/mnist.js';
import { withSeededShuffle } from '../helpers/phase-runs.js';
import { tf, useWasm } from '../helpers/tf.js';

beforeAll(async () => {
  expect(await useWasm()).toBe(true);
});

const report: string[] = [];
afterAll(() => {
  if (process.env.TIDEMARK_PHASES_REPORT) console.log(report.join('\n'));
});

const TRAIN = 3000;

/** Kneedle's knee of a decreasing curve: the index farthest below the normalised chord (Satopää et al. 2011). */
export function kneedle(ys: readonly number[]): number {
  const n = ys.length;
  const lo = Math.min(...ys);
  const hi = Math.max(...ys);
  let best = 0;
  let at = 0;
  for (let i = 0; i < n; i++) {
    const x = i / (n - 1);
    const y = (ys[i]! - lo) / (hi - lo);
    const below = 1 - x - y;
    if (below > best) {
      best = below;
      at = i;
    }
  }
  return at;
}

interface Run {
  windows: readonly WindowRecord[];
  markers: readonly Marker[];
  epochLoss: number[];
  stepsPerEpoch: number;
}

async function train(batch: number, lr: number, epochs: number): Promise<Run> {
  const { xs, ys } = mnistTensors(mnistSplit({ train: TRAIN, seed: 1 }).train);
  const model = mnistModel(lr);
  const mon = await monitor(model, { store: 'memory' });
  const epochLoss: number[] = [];
  const before = tf.memory().numTensors;
  await withSeededShuffle(3, () =>
    model.fit(xs, ys, {
      epochs,
      batchSize: batch,
      callbacks: [mon.callback, { onEpochEnd: async (_e: number, logs?: tf.Logs) => void epochLoss.push(logs!.loss!) }],
    }),
  );
  await mon.close();
  expect(tf.memory().numTensors).toBe(before);
  tf.dispose([xs, ys]);
  model.dispose();
  return { windows: mon.windows(), markers: mon.markers(), epochLoss, stepsPerEpoch: Math.ceil(TRAIN / batch) };
}

const network = (r: Run, kind: Marker['kind']): Marker[] => r.markers.filter((m) => m.layer === null && m.kind === kind);
const epochOf = (r: Run, step: number): number => step / r.stepsPerEpoch;

function describeRun(name: string, r: Run): string {
  const marks = r.markers
    .filter((m) => m.kind === 'drift-start' || m.kind === 'diffusion-start')
    .map((m) => `${m.layer ?? 'network'} ${m.kind} epoch ${epochOf(r, m.step).toFixed(1)} (known ${epochOf(r, m.detected_step).toFixed(1)})`);
  return `${name}: ${marks.join('; ')}`;
}

describe('phases on MNIST digits', { timeout: 240_000 }, () => {
  let small: Run;
  let large: Run;
  beforeAll(async () => {
    small = await train(32, 0.01, 60);
    large = await train(128, 0.04, 40);
    report.push(describeRun('batch 32, lr 0.01', small), describeRun('batch 128, lr 0.04', large));
  }, 180_000);

  it('begins in drift at batch 32 and at batch 128', () => {
    for (const r of [small, large]) {
      const first = r.markers.find((m) => m.layer === null && (m.kind === 'drift-start' || m.kind === 'diffusion-start'));
      expect(first?.kind).toBe('drift-start');
      // Drift from the first windows on, not found late.
      expect(epochOf(r, first!.step)).toBeLessThan(1);
      expect(r.windows[0]!.noise?.status).toBe('measured');
    }
  });

  it('places the network diffusion-start at the same epoch within a factor 1.5 when lr scales with the batch', () => {
    const a = network(small, 'diffusion-start');
    const b = network(large, 'diffusion-start');
    expect(a.length).toBeGreaterThan(0);
    expect(b.length).toBeGreaterThan(0);
    const ea = epochOf(small, a[0]!.step);
    const eb = epochOf(large, b[0]!.step);
    report.push(`network diffusion-start: epoch ${ea.toFixed(1)} at batch 32, ${eb.toFixed(1)} at batch 128`);
    expect(Math.max(ea, eb) / Math.min(ea, eb)).toBeLessThan(1.5);
  });

  it('at lr 0.01 places the network diffusion-start within a factor 2 of the training loss knee (Kneedle)', () => {
    const knee = kneedle(small.epochLoss) + 1; // epochs are counted from 1 at their end
    const d = network(small, 'diffusion-start')[0]!;
    const e = epochOf(small, d.step);
    report.push(`loss knee (Kneedle, ${small.epochLoss.length} epochs): epoch ${knee}; diffusion-start epoch ${e.toFixed(1)}`);
    expect(knee).toBeGreaterThan(2);
    expect(Math.max(e, knee) / Math.min(e, knee)).toBeLessThan(2);
  });
});

describe('kneedle', () => {
  it('finds the knee of y = 1/x on x = 1..10 at x = 3 (hand-worked with the Satopää et al. 2011 definition)', () => {
    // Normalised, the distance below the chord 1 − x_n − y_n is 0, 0.444, 0.519, 0.500, 0.444 for x = 1..5
    // [computed here by hand], so the knee is x = 3.
    const ys = Array.from({ length: 10 }, (_, i) => 1 / (i + 1));
    expect(kneedle(ys) + 1).toBe(3);
  });
});
