/**
 * What the monitor costs a training step, on the reference model (dense 32→64→128→64→32→4, tanh,
 * SGD, batch 32, 4096 samples), on the cpu and wasm backends. Prints tables of figures measured side
 * by side in one run; it asserts nothing. bench/README.md says what each table means.
 *
 *   npm run bench                      # default precision, a few minutes
 *   npm run bench -- --quick           # fewer runs and repetitions
 *   npm run bench -- --runs 8 --epochs 3 --backends cpu
 *   npm run bench -- --long-epochs 40  # Table 5's long runs (default 20 epochs; 5 with --quick)
 *
 * Run node with --expose-gc (NODE_OPTIONS=--expose-gc) to collect garbage between runs.
 */
import { availableParallelism } from 'node:os';
import { createRequire } from 'node:module';
import path from 'node:path';
import { parseArgs } from 'node:util';
import * as tf from '@tensorflow/tfjs';
import { setWasmPaths } from '@tensorflow/tfjs-backend-wasm';
import { countNonFinite, ShiftedMoments } from '../src/analysis/moments.js';
import { SimdFold } from '../src/analysis/simd-fold.js';
import type { Accumulator } from '../src/callback/accumulator.js';
import { JsAccumulator } from '../src/callback/js-accumulator.js';
import { viewModel, type ModelView, type TrackedVariable } from '../src/callback/model-layers.js';
import { monitor, type Monitor, type MonitorCallback } from '../src/callback/monitor.js';
import { installTap, type GradientPair } from '../src/callback/optimizer-tap.js';
import { TensorAccumulator } from '../src/callback/tensor-accumulator.js';
import { BATCH, buildReferenceModel, CLASSES, DATA_SEED, FEATURES, HIDDEN, LR, MODEL_SEED, SAMPLES } from './reference-model.js';
import { median, printTable, progress } from './report.js';
import { normal, teacherData, xorshift32 } from './seeded-data.js';

// ---------------------------------------------------------------------------------------------
// Settings

const STEPS_PER_EPOCH = SAMPLES / BATCH;
/** The target for the monitor's whole cost at default settings, as a fraction of the unmonitored training time. */
const TARGET = 0.03;
/** The targets for the tap alone, as a fraction of an unmonitored step, per backend. */
const TAP_TARGET: Record<string, number> = { cpu: 0.01, wasm: 0.02 };
/** Minibatch gradients the recompute design draws per window. */
const K_RECOMPUTE = 20;
/** Window lengths (steps) to amortise per-window costs over: the first 'auto' window, a middle one, an epoch. */
const WINDOW_LENGTHS = [8, 30, STEPS_PER_EPOCH] as const;
/** Steps dropped from the start of every timed run (first-call allocations, JIT). */
const SKIP_STEPS = 10;

const USAGE = `usage: tsx bench/overhead.ts [--quick] [--runs N] [--epochs N] [--long-epochs N] [--backends cpu,wasm]
  --quick          3 rounds, fewer repetitions, 5-epoch long runs
  --runs N         interleaved rounds per backend (default 16; each round trains every variant once)
  --epochs N       epochs per training run of Tables 1–2b (default 1; ${STEPS_PER_EPOCH} steps each)
  --long-epochs N  epochs of Table 5's long runs (default 20; 5 with --quick)
  --backends L     comma-separated list from cpu,wasm (default both)`;

interface Settings {
  runs: number;
  epochs: number;
  longEpochs: number;
  backends: ('cpu' | 'wasm')[];
  tapReps: number;
  closeReps: number;
  recomputeReps: number;
  quick: boolean;
}

function positiveInt(name: string, raw: string | undefined, fallback: number): number {
  if (raw === undefined) return fallback;
  const n = Number(raw);
  if (!Number.isInteger(n) || n < 1) throw new RangeError(`--${name} must be a positive integer, got '${raw}'`);
  return n;
}

function readSettings(): Settings | null {
  const { values } = parseArgs({
    options: {
      quick: { type: 'boolean', default: false },
      runs: { type: 'string' },
      epochs: { type: 'string' },
      'long-epochs': { type: 'string' },
      backends: { type: 'string' },
      help: { type: 'boolean', short: 'h', default: false },
    },
  });
  if (values.help) {
    console.log(USAGE);
    return null;
  }
  const quick = values.quick === true;
  const backends = (values.backends ?? 'cpu,wasm').split(',').map((b) => b.trim());
  for (const b of backends) if (b !== 'cpu' && b !== 'wasm') throw new RangeError(`--backends: unknown backend '${b}'`);
  return {
    runs: positiveInt('runs', values.runs, quick ? 3 : 16),
    epochs: positiveInt('epochs', values.epochs, 1),
    longEpochs: positiveInt('long-epochs', values['long-epochs'], quick ? 5 : 20),
    backends: backends as ('cpu' | 'wasm')[],
    tapReps: quick ? 100 : 400,
    closeReps: quick ? 20 : 60,
    recomputeReps: quick ? 3 : 7,
    quick,
  };
}

// ---------------------------------------------------------------------------------------------
// Small statistics and printing helpers

const now = (): number => performance.now();
const gc = (globalThis as { gc?: () => void }).gc;


function mean(xs: readonly number[]): number {
  return xs.length === 0 ? Number.NaN : xs.reduce((a, b) => a + b, 0) / xs.length;
}

function sum0(xs: readonly number[]): number {
  return xs.reduce((a, b) => a + b, 0);
}

function quantile(xs: readonly number[], q: number): number {
  if (xs.length === 0) return Number.NaN;
  const s = [...xs].sort((a, b) => a - b);
  return s[Math.min(s.length - 1, Math.floor(q * s.length))]!;
}

function ms(x: number, digits = 3): string {
  return Number.isFinite(x) ? x.toFixed(digits) : '—';
}

function pct(fraction: number): string {
  return Number.isFinite(fraction) ? `${(100 * fraction).toFixed(2)} %` : '—';
}

function ratio(x: number): string {
  return Number.isFinite(x) ? x.toFixed(3) : '—';
}

function mark(fraction: number, target = TARGET): string {
  if (!Number.isFinite(fraction)) return '—';
  return fraction <= target ? 'PASS' : 'OVER';
}

function seconds(x: number): string {
  return Number.isFinite(x) ? `${(x / 1000).toFixed(2)} s` : '—';
}

// ---------------------------------------------------------------------------------------------
// The reference model and its data

interface Reference {
  model: tf.Sequential;
  optimizer: tf.Optimizer;
}

function buildModel(seed: number): Reference {
  const model = buildReferenceModel(seed);
  return { model, optimizer: model.optimizer };
}

function disposeModel(ref: Reference): void {
  ref.model.dispose();
  // The model does not own an optimizer passed in as an object.
  ref.optimizer.dispose();
}

function trainableVariables(model: tf.LayersModel): tf.Variable[] {
  return model.trainableWeights.map((w) => w.read() as tf.Variable);
}

function batchLoss(model: tf.LayersModel, xb: tf.Tensor, yb: tf.Tensor): tf.Scalar {
  return tf.mean(tf.metrics.categoricalCrossentropy(yb, model.apply(xb) as tf.Tensor));
}

type ApplyGradients = (...args: unknown[]) => unknown;

/**
 * Wraps the optimizer's current applyGradients with a timer. Installed once before monitor()
 * (times the bare update) and once after (times tap + update); the difference per step is the tap.
 */
function timeApplyGradients(optimizer: tf.Optimizer, sink: number[]): void {
  timeMethod(optimizer, 'applyGradients', sink);
}

function timeMethod(target: object, method: string, sink: number[]): void {
  const o = target as Record<string, ApplyGradients>;
  const inner = o[method]!;
  o[method] = function (this: unknown, ...args: unknown[]): unknown {
    const t0 = now();
    const result = inner.apply(this, args);
    sink.push(now() - t0);
    return result;
  };
}

// ---------------------------------------------------------------------------------------------
// Table 1 and 2: training runs with and without the monitor

type Variant = 'none' | 'auto' | 'tensor';
const VARIANTS: readonly Variant[] = ['none', 'auto', 'tensor'];

interface HookTimes {
  /** onBatchEnd calls that closed no window. */
  batchEnd: number[];
  /** Hook calls that closed a window (read-back, statistics, record, sink write). */
  close: number[];
  /** Everything else the monitor's hooks took. */
  otherMs: number;
}

interface RunResult {
  variant: Variant;
  accumulator: 'js' | 'tensor' | null;
  /** Wall time between consecutive batch ends, warm-up steps dropped. */
  stepMs: number[];
  /** Per step: optimizer.computeGradients (forward + backward), which the monitor does not touch. */
  fwdBwdMs: number[];
  /** fit() wall time divided by its steps (everything included). */
  fitMsPerStep: number;
  steps: number;
  /** Per step: (outer applyGradients timer) − (inner timer), warm-up steps dropped. */
  tapMs: number[];
  /** The same, split: the first step of each window (which also reads the weights) and the others. */
  tapSampledMs: number[];
  tapPlainMs: number[];
  hooks: HookTimes;
  windowLengths: number[];
  warnings: number;
  /** fit() wall time, ms. */
  fitMs: number;
  /** Noise measurements (mon.noiseCost()) and, per measurement, its own ms (null without a monitor). */
  noise: { calls: number; ms: number; each: number[] } | null;
}

/** Wraps the monitor's hooks with timers; `after` runs after each timed call, outside the timing. */
function timedHooks(mon: Monitor, times: HookTimes, after?: () => void): MonitorCallback {
  let closes = 0;
  mon.onWindow(() => {
    closes++;
  });
  const cb = mon.callback;
  const timed = async (call: () => Promise<void>, batchEnd: boolean): Promise<void> => {
    const before = closes;
    const t0 = now();
    await call();
    const dt = now() - t0;
    if (closes > before) times.close.push(dt);
    else if (batchEnd) times.batchEnd.push(dt);
    else times.otherMs += dt;
    after?.();
  };
  return {
    onTrainBegin: (logs) => timed(() => cb.onTrainBegin(logs), false),
    onTrainEnd: (logs) => timed(() => cb.onTrainEnd(logs), false),
    onEpochBegin: (epoch, logs) => timed(() => cb.onEpochBegin(epoch, logs), false),
    onEpochEnd: (epoch, logs) => timed(() => cb.onEpochEnd(epoch, logs), false),
    onBatchEnd: (batch, logs) => timed(() => cb.onBatchEnd(batch, logs), true),
  };
}

/**
 * One training run of the reference model. `bareDefaults` passes the monitor nothing but `store: 'memory'`
 * (Table 5); otherwise window 'auto' and the variant's accumulator are named (the same as the defaults for 'auto').
 */
async function trainRun(variant: Variant, x: tf.Tensor, y: tf.Tensor, epochs: number, skip = SKIP_STEPS, bareDefaults = false): Promise<RunResult> {
  gc?.();
  const ref = buildModel(MODEL_SEED);
  const inner: number[] = [];
  const outer: number[] = [];
  timeApplyGradients(ref.optimizer, inner);
  const fwdBwd: number[] = [];
  timeMethod(ref.optimizer, 'computeGradients', fwdBwd);
  const mon =
    variant === 'none'
      ? null
      : await monitor(ref.model, bareDefaults && variant === 'auto' ? { store: 'memory' } : { store: 'memory', window: 'auto', accumulator: variant });
  timeApplyGradients(ref.optimizer, outer);
  // The first step of each window is 'sampled': the accumulator also reads the weights around it.
  const sampled = new Set<number>([0]);
  mon?.onWindow(() => {
    sampled.add(outer.length);
  });
  const hooks: HookTimes = { batchEnd: [], close: [], otherMs: 0 };
  const stepMs: number[] = [];
  let last = 0;
  const clock: MonitorCallback = {
    onTrainBegin: async () => {},
    onTrainEnd: async () => {},
    onEpochBegin: async () => {
      last = now();
    },
    onEpochEnd: async () => {},
    onBatchEnd: async () => {
      const t = now();
      stepMs.push(t - last);
      last = t;
    },
  };
  // Each noise measurement's own time: the change of mon.noiseCost() across the hook call that ran it.
  const noiseEach: number[] = [];
  let noiseSeen = { calls: 0, ms: 0 };
  const afterHook = (): void => {
    const c = mon?.noiseCost() ?? null;
    if (c === null || c.calls === noiseSeen.calls) return;
    noiseEach.push(c.ms - noiseSeen.ms);
    noiseSeen = c;
  };
  const callbacks: MonitorCallback[] = mon === null ? [clock] : [timedHooks(mon, hooks, afterHook), clock];
  const t0 = now();
  await ref.model.fit(x, y, { batchSize: BATCH, epochs, verbose: 0, callbacks });
  const fitMs = now() - t0;
  const steps = stepMs.length;
  const tap = outer.map((t, i) => t - inner[i]!);
  const kept = (keep: (i: number) => boolean): number[] => tap.filter((_, i) => i >= skip && keep(i));
  const result: RunResult = {
    variant,
    accumulator: mon?.accumulator ?? null,
    stepMs: stepMs.slice(skip),
    fwdBwdMs: fwdBwd.slice(skip),
    fitMsPerStep: fitMs / steps,
    steps,
    tapMs: kept(() => true),
    tapSampledMs: kept((i) => sampled.has(i)),
    tapPlainMs: kept((i) => !sampled.has(i)),
    hooks,
    windowLengths: mon === null ? [] : mon.windows().map((w) => w.batches),
    warnings: mon === null ? 0 : mon.warnings().length,
    fitMs,
    noise: mon === null ? null : { ...(mon.noiseCost() ?? { calls: 0, ms: 0 }), each: noiseEach },
  };
  await mon?.close();
  disposeModel(ref);
  return result;
}

// ---------------------------------------------------------------------------------------------
// Table 2 (cross-check): the tap on the same gradients, tapped vs untapped; accumulator close alone

interface Isolated {
  /** Paired per repetition: tapped − untapped applyGradients on the same gradients. */
  tapDiff: number[];
  /** accumulator.close() alone after 8 gradients. */
  accClose: number[];
}

function pairsOf(list: { name: string; tensor: tf.Tensor }[]): GradientPair[] {
  return list.map((g) => [g.name, g.tensor] as const);
}

/** A fresh reference model and the gradients of its first minibatch, as applyGradients receives them. */
function firstBatchGradients(x: tf.Tensor, y: tf.Tensor): { ref: Reference; list: { name: string; tensor: tf.Tensor }[] } {
  const ref = buildModel(MODEL_SEED);
  const vars = trainableVariables(ref.model);
  const grads = tf.tidy(() => {
    const xb = x.slice([0, 0], [BATCH, FEATURES]);
    const yb = y.slice([0, 0], [BATCH, CLASSES]);
    return tf.variableGrads(() => batchLoss(ref.model, xb, yb), vars).grads;
  });
  return { ref, list: vars.map((v) => ({ name: v.name, tensor: grads[v.name]! })) };
}

async function isolated(kind: 'auto' | 'tensor', x: tf.Tensor, y: tf.Tensor, s: Settings): Promise<Isolated> {
  gc?.();
  const { ref, list } = firstBatchGradients(x, y);
  const opt = ref.optimizer as unknown as { applyGradients: ApplyGradients };
  const original = opt.applyGradients;
  const mon = await monitor(ref.model, { store: 'memory', window: 'auto', accumulator: kind });
  const untappedCall = (): unknown => original.call(ref.optimizer, list);
  const tappedCall = (): unknown => opt.applyGradients(list);
  const tapDiff = pairedDifference(untappedCall, tappedCall, s.tapReps);
  await mon.close();

  // The accumulator's close on its own (no statistics, no record), after 8 minibatches.
  const view = viewModel(ref.model);
  const acc: Accumulator = kind === 'tensor' ? new TensorAccumulator(view) : new JsAccumulator(view);
  const pairs = pairsOf(list);
  const accClose: number[] = [];
  for (let r = 0; r < s.closeReps + 3; r++) {
    for (let k = 0; k < 8; k++) {
      acc.before(pairs, k === 0);
      acc.after(k === 0);
    }
    const t0 = now();
    await acc.close();
    if (r >= 3) accClose.push(now() - t0);
  }
  acc.dispose();
  tf.dispose(list.map((g) => g.tensor));
  disposeModel(ref);
  return { tapDiff, accClose };
}

/**
 * `reps` paired timings of `base` and `other`, in alternating order so neither always runs
 * second; returns other − base per pair.
 */
function pairedDifference(base: () => unknown, other: () => unknown, reps: number, warm = 30): number[] {
  for (let i = 0; i < warm; i++) {
    base();
    other();
  }
  const diff: number[] = [];
  for (let r = 0; r < reps; r++) {
    const first = r % 2 === 0 ? base : other;
    const second = r % 2 === 0 ? other : base;
    let t0 = now();
    first();
    const t1 = now() - t0;
    t0 = now();
    second();
    const t2 = now() - t0;
    diff.push(r % 2 === 0 ? t2 - t1 : t1 - t2);
  }
  return diff;
}

/** Median wall time of `f` over `reps` calls, after `warm` unmeasured ones. */
function timeMedian(f: () => void, reps: number, warm = 20): number {
  for (let i = 0; i < warm; i++) f();
  const t: number[] = [];
  for (let i = 0; i < reps; i++) {
    const t0 = now();
    f();
    t.push(now() - t0);
  }
  return median(t);
}

/** Where the js tap's time goes, on one minibatch's gradients of the reference model (median ms per step). */
function tapBreakdown(x: tf.Tensor, y: tf.Tensor, s: Settings): [string, number][] {
  gc?.();
  const { ref, list } = firstBatchGradients(x, y);
  const tensors = list.map((g) => g.tensor);
  const reps = s.tapReps;
  const out: [string, number][] = [];

  // The wrapper itself, with a listener that does nothing.
  const opt = ref.optimizer as unknown as { applyGradients: ApplyGradients };
  const original = opt.applyGradients;
  const remove = installTap(ref.optimizer, { before: () => {}, after: () => {}, onError: () => {} });
  const wrapper = pairedDifference(
    () => original.call(ref.optimizer, list),
    () => opt.applyGradients(list),
    reps,
  );
  remove();
  out.push(['tap wrapper, no-op listener (tapped − untapped)', median(wrapper)]);

  out.push(['read gradients back: dataSync × ' + tensors.length, timeMedian(() => tensors.forEach((t) => t.dataSync()), reps)]);
  const data = tensors.map((t) => t.dataSync() as Float32Array);
  out.push(['countNonFinite over all gradients', timeMedian(() => data.forEach((d) => countNonFinite(d)), reps)]);
  const moments = data.map((d) => new ShiftedMoments(d.length));
  out.push(['ShiftedMoments.push of all gradients', timeMedian(() => data.forEach((d, i) => moments[i]!.push(d)), reps)]);
  // A block of four steps (the same gradients four times), per step: the JavaScript loop and the SIMD kernel.
  const blockJs = data.map((d) => new ShiftedMoments(d.length));
  out.push([
    'pushBlock of 4, JavaScript loop, per step',
    timeMedian(() => data.forEach((d, i) => blockJs[i]!.pushBlock([d, d, d, d])), reps) / 4,
  ]);
  const fold = SimdFold.create(data.map((d) => d.length));
  if (fold !== null) {
    fold.vectors.forEach((v, i) => v.slots.forEach((slot) => slot.set(data[i]!)));
    const blockSimd = fold.vectors.map((v) => new ShiftedMoments(v.s1.length, { ...v, fold }));
    out.push([
      'pushBlock of 4, WebAssembly SIMD kernel, per step',
      timeMedian(() => fold.vectors.forEach((v, i) => blockSimd[i]!.pushBlock(v.slots)), reps) / 4,
    ]);
    // What the accumulator runs: one call for every variable.
    const all = SimdFold.create(data.map((d) => d.length))!;
    all.vectors.forEach((v, i) => v.slots.forEach((slot) => slot.set(data[i]!)));
    out.push(['kernel foldAll of 4, one call for every variable, per step', timeMedian(() => all.foldAll(1), reps) / 4]);
  }

  const view = viewModel(ref.model);
  const pairs = pairsOf(list);
  const js = new JsAccumulator(view);
  out.push([
    'JsAccumulator before + after, plain step',
    timeMedian(() => {
      js.before(pairs, false);
      js.after(false);
    }, reps),
  ]);
  out.push([
    'JsAccumulator before + after, first step of a window',
    timeMedian(() => {
      js.before(pairs, true);
      js.after(true);
    }, Math.max(20, reps >> 2)),
  ]);
  js.dispose();
  const tens = new TensorAccumulator(view);
  out.push([
    'TensorAccumulator before + after, plain step',
    timeMedian(() => {
      tens.before(pairs, false);
      tens.after(false);
    }, Math.max(20, reps >> 2)),
  ]);
  tens.dispose();
  tf.dispose(list.map((g) => g.tensor));
  disposeModel(ref);
  return out;
}

// ---------------------------------------------------------------------------------------------
// Table 3: the alternative design, K recomputed gradients per window

function recomputeWindow(model: tf.LayersModel, vars: tf.Variable[], x: tf.Tensor, y: tf.Tensor, k: number): number {
  const t0 = now();
  const moments = vars.map((v) => new ShiftedMoments(v.size));
  for (let i = 0; i < k; i++) {
    tf.tidy(() => {
      const start = (i * BATCH) % SAMPLES;
      const xb = x.slice([start, 0], [BATCH, FEATURES]);
      const yb = y.slice([start, 0], [BATCH, CLASSES]);
      const { grads } = tf.variableGrads(() => batchLoss(model, xb, yb), vars);
      vars.forEach((v, j) => moments[j]!.push(grads[v.name]!.dataSync()));
    });
  }
  let sink = 0;
  for (const m of moments) sink += m.meanSquaredNorm() + m.varianceTrace();
  if (!Number.isFinite(sink)) throw new Error('recompute produced non-finite statistics');
  return now() - t0;
}

function recompute(x: tf.Tensor, y: tf.Tensor, s: Settings): number[] {
  gc?.();
  const ref = buildModel(MODEL_SEED);
  const vars = trainableVariables(ref.model);
  recomputeWindow(ref.model, vars, x, y, K_RECOMPUTE); // warm-up
  const out: number[] = [];
  for (let r = 0; r < s.recomputeReps; r++) out.push(recomputeWindow(ref.model, vars, x, y, K_RECOMPUTE));
  disposeModel(ref);
  return out;
}

// ---------------------------------------------------------------------------------------------
// Table 4: precision (methods.md §4 rows 4–6, 9, and a gradient-like stream)

interface PrecisionCase {
  label: string;
  values: number[];
  exact: number;
}

function precisionCases(): PrecisionCase[] {
  const offsets = [4, 7, 13, 16];
  const rows: [string, number][] = [
    ['1e4+{4,7,13,16} (§4 row 5)', 1e4],
    ['1e5+{4,7,13,16} (§4 row 4)', 1e5],
    ['1e6+{4,7,13,16} (§4 row 6)', 1e6],
    ['1e7+{4,7,13,16} (§4 row 9)', 1e7],
  ];
  const cases: PrecisionCase[] = rows.map(([label, base]) => ({ label, values: offsets.map((o) => base + o), exact: 30 }));
  // Twenty float32 "gradients" 1 + 1e-4·z: the common offset is 10⁴ standard deviations.
  const rng = xorshift32(99);
  const values = Array.from({ length: 20 }, () => Math.fround(1 + 1e-4 * normal(rng)));
  const m = values.reduce((a, b) => a + b, 0) / values.length;
  const exact = values.reduce((a, v) => a + (v - m) * (v - m), 0) / (values.length - 1); // float64 two-pass
  cases.push({ label: '20 × f32(1 + 1e-4·z)', values, exact });
  return cases;
}

/** (Σx² − (Σx)²/n)/(n−1) with every intermediate rounded to float32. */
function naiveFloat32(xs: readonly number[]): number {
  const f = Math.fround;
  let s = 0;
  let q = 0;
  for (const x of xs) {
    s = f(s + x);
    q = f(q + f(x * x));
  }
  const n = xs.length;
  return f(f(q - f(f(s * s) / n)) / (n - 1));
}

/** Welford's update with every intermediate rounded to float32 (methods.md §4's reference column). */
function welfordFloat32(xs: readonly number[]): number {
  const f = Math.fround;
  let n = 0;
  let m = 0;
  let m2 = 0;
  for (const x of xs) {
    n++;
    const d = f(x - m);
    m = f(m + f(d / n));
    m2 = f(m2 + f(d * f(x - m)));
  }
  return f(m2 / (n - 1));
}

function shiftedFloat64(xs: readonly number[]): number {
  const m = new ShiftedMoments(1);
  for (const x of xs) m.push([x]);
  return m.varianceTrace();
}

let precisionVariable = 0;

/** The library's own accumulator class fed the values as one-element float32 "gradients". */
async function viaAccumulator(kind: 'js' | 'tensor', xs: readonly number[]): Promise<number> {
  const init = tf.zeros([1]);
  const variable = tf.variable(init, true, `tidemark_bench_precision_${precisionVariable++}`);
  init.dispose();
  const tv: TrackedVariable = { name: variable.name, layer: 'p', index: 0, shape: [1], size: 1, variable };
  const view: ModelView = {
    optimizer: null as unknown as tf.Optimizer,
    layers: [{ name: 'p', className: 'Bench', params: 1, variables: [tv] }],
    variables: [tv],
    byName: new Map([[tv.name, tv]]),
  };
  const acc: Accumulator = kind === 'js' ? new JsAccumulator(view) : new TensorAccumulator(view);
  for (const x of xs) {
    const t = tf.tensor1d([x], 'float32');
    acc.before([[tv.name, t]], false);
    acc.after(false);
    t.dispose();
  }
  const raw = await acc.close();
  acc.dispose();
  variable.dispose();
  return raw[0]!.varianceTrace;
}

// ---------------------------------------------------------------------------------------------
// One backend

interface BackendResult {
  backend: string;
  runs: RunResult[][]; // [round][variant index]
  isolated: Record<'auto' | 'tensor', Isolated>;
  recomputeMs: number[];
  breakdown: [string, number][];
  /** Table 5: one long run without the monitor, then one with it at default settings. */
  long: { none: RunResult; auto: RunResult };
  precisionJs: number[];
  precisionTensor: number[];
  tensorCounts: [string, number][];
}

function wasmDir(): string {
  const main = createRequire(import.meta.url).resolve('@tensorflow/tfjs-backend-wasm');
  return `${path.dirname(main)}${path.sep}`;
}

async function runBackend(backend: 'cpu' | 'wasm', s: Settings): Promise<BackendResult> {
  if (!(await tf.setBackend(backend))) throw new Error(`backend ${backend} did not initialise`);
  await tf.ready();
  const counts: [string, number][] = [['start', tf.memory().numTensors]];
  const data = teacherData(SAMPLES, FEATURES, CLASSES, DATA_SEED);
  const x = tf.tensor2d(data.x, [SAMPLES, FEATURES]);
  const y = tf.tensor2d(data.y, [SAMPLES, CLASSES]);

  progress(`${backend}: warm-up`);
  const xw = x.slice([0, 0], [1024, FEATURES]);
  const yw = y.slice([0, 0], [1024, CLASSES]);
  for (const v of VARIANTS) await trainRun(v, xw, yw, 1, 0);
  tf.dispose([xw, yw]);
  counts.push(['after warm-up', tf.memory().numTensors]);

  const runs: RunResult[][] = [];
  for (let r = 0; r < s.runs; r++) {
    // A B C, then C B A: interleaved, and no variant always first.
    const order = r % 2 === 0 ? VARIANTS : [...VARIANTS].reverse();
    const round: Partial<Record<Variant, RunResult>> = {};
    for (const v of order) {
      progress(`${backend}: round ${r + 1}/${s.runs}, ${v === 'none' ? 'no monitor' : `monitor (accumulator ${v})`}`);
      round[v] = await trainRun(v, x, y, s.epochs);
    }
    runs.push(VARIANTS.map((v) => round[v]!));
  }
  counts.push([`after ${s.runs * VARIANTS.length} training runs`, tf.memory().numTensors]);

  progress(`${backend}: isolated tap and close`);
  const iso = { auto: await isolated('auto', x, y, s), tensor: await isolated('tensor', x, y, s) };
  const breakdown = tapBreakdown(x, y, s);
  counts.push(['after isolated tap/close', tf.memory().numTensors]);

  progress(`${backend}: recomputing K=${K_RECOMPUTE} gradients per window`);
  const recomputeMs = recompute(x, y, s);
  counts.push(['after recompute', tf.memory().numTensors]);

  // Table 5: the whole cost over a long run, measured inside the monitored run; the unmonitored run of the same
  // length only gives a (noisy) end-to-end ratio. No steps are dropped: the whole run counts.
  const longSteps = s.longEpochs * STEPS_PER_EPOCH;
  progress(`${backend}: long run without the monitor (${s.longEpochs} epochs, ${longSteps} steps)`);
  const longNone = await trainRun('none', x, y, s.longEpochs, 0);
  progress(`${backend}: long run with the monitor at default settings (${s.longEpochs} epochs, ${longSteps} steps)`);
  const longAuto = await trainRun('auto', x, y, s.longEpochs, 0, true);
  counts.push(['after long runs', tf.memory().numTensors]);

  tf.dispose([x, y]);
  counts.push(['end (data disposed)', tf.memory().numTensors]);
  return {
    backend,
    runs,
    isolated: iso,
    recomputeMs,
    breakdown,
    long: { none: longNone, auto: longAuto },
    precisionJs: [],
    precisionTensor: [],
    tensorCounts: counts,
  };
}

/**
 * Runs after all timings: feeding ShiftedMoments plain arrays here would make its hot loop
 * polymorphic for any timing that came later.
 */
async function runPrecision(b: BackendResult): Promise<void> {
  await tf.setBackend(b.backend);
  const before = tf.memory().numTensors;
  for (const c of precisionCases()) {
    b.precisionJs.push(await viaAccumulator('js', c.values));
    b.precisionTensor.push(await viaAccumulator('tensor', c.values));
  }
  b.tensorCounts.push(['precision: before', before], ['after', tf.memory().numTensors]);
}

// ---------------------------------------------------------------------------------------------
// Report

interface Summary {
  backend: string;
  baseStep: number;
  e2e: number;
  /** Median over rounds of the paired forward+backward ratio (the machine's own drift). */
  control: number;
  tapPct: number;
  tapMedianPct: number;
  /** Table 5: the whole monitor cost over the long run, and the same without the first noise measurement. */
  whole: number;
  wholeLessFirst: number;
  /** Table 5: fit wall time monitored / unmonitored, and the forward+backward ratio of the same pair. */
  longE2e: number;
  longControl: number;
}

function report(results: BackendResult[], s: Settings): Summary[] {
  const summaries: Summary[] = [];

  // Table 1
  const rows1: string[][] = [];
  for (const b of results) {
    const perVariant = (vi: number): RunResult[] => b.runs.map((round) => round[vi]!);
    const base = perVariant(0);
    const baseStep = median(base.map((r) => median(r.stepMs)));
    VARIANTS.forEach((v, vi) => {
      const rs = perVariant(vi);
      const step = median(rs.map((r) => median(r.stepMs)));
      const fit = median(rs.map((r) => r.fitMsPerStep));
      const paired = b.runs.map((round) => median(round[vi]!.stepMs) / median(round[0]!.stepMs));
      const pairedFit = b.runs.map((round) => round[vi]!.fitMsPerStep / round[0]!.fitMsPerStep);
      const pairedFwdBwd = b.runs.map((round) => median(round[vi]!.fwdBwdMs) / median(round[0]!.fwdBwdMs));
      const e2e = median(paired);
      const label = v === 'none' ? 'no monitor' : v === 'auto' ? `monitor, defaults (${rs[0]!.accumulator})` : 'monitor, accumulator tensor';
      rows1.push([
        `${b.backend}  ${label}`,
        ms(step),
        ms(fit),
        vi === 0 ? '1 (base)' : ratio(e2e),
        vi === 0 ? '' : `${ratio(Math.min(...paired))}–${ratio(Math.max(...paired))}`,
        vi === 0 ? '1 (base)' : ratio(median(pairedFit)),
        ms(median(rs.map((r) => median(r.fwdBwdMs)))),
        vi === 0 ? '1 (base)' : `${ratio(median(pairedFwdBwd))} (${ratio(Math.min(...pairedFwdBwd))}–${ratio(Math.max(...pairedFwdBwd))})`,
        v === 'auto' ? mark(e2e - 1) : v === 'none' ? '' : `(${mark(e2e - 1).toLowerCase()})`,
      ]);
      if (v === 'auto') {
        summaries.push({
          backend: b.backend,
          baseStep,
          e2e,
          control: median(pairedFwdBwd),
          tapPct: Number.NaN,
          tapMedianPct: Number.NaN,
          whole: Number.NaN,
          wholeLessFirst: Number.NaN,
          longE2e: Number.NaN,
          longControl: Number.NaN,
        });
      }
    });
  }
  printTable(
    `Table 1. End to end: reference model, ${s.runs} interleaved rounds × ${s.epochs} epoch(s) of ${STEPS_PER_EPOCH} steps per variant`,
    [
      'backend  variant',
      'median ms/step',
      'fit ms/step',
      'ratio (median)',
      'ratio range',
      'ratio (fit)',
      'fwd+bwd ms',
      'fwd+bwd ratio (range)',
      `≤${TARGET * 100}%`,
    ],
    rows1,
    [
      'median ms/step: median over runs of each run’s median step (batch end to batch end; first steps dropped).',
      'fit ms/step: whole fit() wall time / steps, window closes and epoch ends included.',
      'ratio: median over rounds of (monitored / unmonitored) in the same round; range = min–max over rounds.',
      'fwd+bwd: median optimizer.computeGradients per step, which the monitor does not touch: its ratio shows how much',
      '  the machine itself sped up or slowed down between paired runs (1.000 on a quiet machine).',
      'End-to-end ratios swing by several % on this machine; Table 2 is the figure to trust.',
      `The ≤${TARGET * 100}% mark here is for orientation: a ${s.epochs}-epoch run carries the run’s first noise measurement and`,
      '  short windows; the 3 % target is checked over a long run in Table 5.',
    ],
  );

  // Table 2
  const rows2: string[][] = [];
  const rows2b: string[][] = [];
  for (const b of results) {
    const sum = summaries.find((x) => x.backend === b.backend)!;
    const control = b.runs.flatMap((round) => round[0]!.tapMs);
    for (const [vi, kind] of [
      [1, 'auto'],
      [2, 'tensor'],
    ] as const) {
      const rs = b.runs.map((round) => round[vi]!);
      const label = kind === 'auto' ? ' (default)' : '';
      const tap = rs.flatMap((r) => r.tapMs);
      const tapMean = mean(tap);
      const iso = b.isolated[kind];
      const frac = tapMean / sum.baseStep;
      const tapTarget = TAP_TARGET[b.backend] ?? TARGET;
      if (kind === 'auto') {
        sum.tapPct = frac;
        sum.tapMedianPct = median(tap) / sum.baseStep;
      }
      rows2.push([
        `${b.backend}  ${rs[0]!.accumulator}${label}`,
        ms(median(rs.flatMap((r) => r.tapPlainMs))),
        ms(median(rs.flatMap((r) => r.tapSampledMs))),
        ms(tapMean),
        ms(quantile(tap, 0.99)),
        ms(median(iso.tapDiff)),
        ms(median(control), 4),
        pct(median(tap) / sum.baseStep),
        pct(frac),
        kind === 'auto' ? `${mark(frac, tapTarget)} ≤${tapTarget * 100}%` : `(${mark(frac, tapTarget).toLowerCase()})`,
      ]);

      const batchEnd = rs.flatMap((r) => r.hooks.batchEnd);
      const closes = rs.flatMap((r) => r.hooks.close);
      const lengths = rs.flatMap((r) => r.windowLengths);
      const steps = rs.reduce((a, r) => a + r.steps, 0);
      // Everything the monitor did per step: mean tap (warm-up steps dropped) + all hook time / all steps.
      const hookMs = rs.reduce((a, r) => a + sum0(r.hooks.batchEnd) + sum0(r.hooks.close) + r.hooks.otherMs, 0);
      const allWork = tapMean + hookMs / steps;
      rows2b.push([
        `${b.backend}  ${rs[0]!.accumulator}`,
        ms(median(batchEnd)),
        ms(median(closes)),
        ms(Math.max(...closes)),
        ms(median(iso.accClose)),
        `${(lengths.length / rs.length).toFixed(1)} × ${mean(lengths).toFixed(1)}`,
        ms(allWork),
        pct(allWork / sum.baseStep),
      ]);
    }
  }
  printTable(
    'Table 2. Time inside the tap per step (ms), measured around optimizer.applyGradients',
    [
      'backend  accumulator',
      'plain: median',
      'first: median',
      'all: mean',
      'all: p99',
      'isolated: median',
      'control',
      '% step (median)',
      '% step (mean)',
      'tap target',
    ],
    rows2,
    [
      'In fit, per step: (timer around the tapped applyGradients) − (timer around the original one inside it), same step.',
      '  plain: steps that only fold the gradients in; first: the first step of each window, which also reads the',
      '  weights before and after the update (for the update ratio); all: every step (first steps dropped per run).',
      'isolated: same gradients applied again and again, tapped − untapped call, paired and alternated, median.',
      'control: the same two timers with no monitor installed (the measurement floor).',
      '% step: in-fit median or mean over all steps / median unmonitored step of Table 1; the mark uses the mean.',
      `tap target: the tap alone, ≤${TAP_TARGET.cpu! * 100} % of a step on cpu and ≤${TAP_TARGET.wasm! * 100} % on wasm.`,
    ],
  );
  printTable(
    'Table 2b. The rest of the monitor’s work, in fit (ms)',
    ['backend  accumulator', 'onBatchEnd', 'close: median', 'close: max', 'acc.close alone', 'windows/run × len', 'all work/step', '% of step'],
    rows2b,
    [
      'onBatchEnd: the monitor’s batch-end hook when it closes no window (log averaging, schedule).',
      'close: a hook call that closed a window: accumulator.close, read-back, statistics, travel fit, record, memory store,',
      '  and the noise measurement when one is due (measureNoise runs inside closeWindow, inside the hook); close: max is',
      '  a close that ran one (a 1-epoch run has one measurement, at its first window).',
      'acc.close alone: JsAccumulator/TensorAccumulator.close() on its own after 8 minibatches (isolated);',
      '  close − acc.close ≈ building the record. windows/run × len: windows closed per run × mean window length (steps).',
      `all work/step: (Σ tap + Σ hook time) / steps over all runs, i.e. amortised over these ${s.epochs}-epoch runs, whose`,
      `  'auto' windows are still short (8, 10, 13, … steps); in long runs windows reach one epoch (${STEPS_PER_EPOCH} steps).`,
    ],
  );

  printTable(
    'Table 2c. Where the tap’s time goes: one minibatch’s gradients of the reference model, repeated (median ms)',
    ['part', ...results.map((b) => b.backend)],
    (results[0]?.breakdown ?? []).map(([name], i) => [name, ...results.map((b) => ms(b.breakdown[i]![1]))]),
    [
      'The JsAccumulator rows contain a read-back, the non-finite check and a quarter of a block fold (plus the',
      '  per-layer bookkeeping). pushBlock of 4: one block of four minibatches folded, ÷ 4, per variable; foldAll: the same',
      '  for every variable in one kernel call, which is what the JsAccumulator runs on cpu and wasm (it copies the gradients',
      '  into the kernel’s memory).',
      'First step of a window: also reads every weight before and after the update (update ratio).',
    ],
  );

  // Table 3
  const rows3: string[][] = [];
  for (const b of results) {
    const sum = summaries.find((x) => x.backend === b.backend)!;
    const rs = b.runs.map((round) => round[1]!);
    const tapMean = mean(rs.flatMap((r) => r.tapMs));
    const close = median(rs.flatMap((r) => r.hooks.close));
    const rec = median(b.recomputeMs);
    const fwdBwd = median(b.runs.map((round) => median(round[0]!.fwdBwdMs)));
    const designs: [string, number, number][] = [
      ['tap (js, default)', tapMean, close],
      [`recompute K=${K_RECOMPUTE} (variableGrads)`, 0, rec + close],
      [`  lower bound: ${K_RECOMPUTE} × fit's fwd+bwd`, 0, K_RECOMPUTE * fwdBwd + close],
    ];
    for (const [name, perStep, perWindow] of designs) {
      const amortised = WINDOW_LENGTHS.map((L) => perStep + perWindow / L);
      rows3.push([
        `${b.backend}  ${name}`,
        ms(perStep),
        ms(perWindow, 2),
        ...amortised.map((a) => ms(a)),
        pct(amortised[amortised.length - 1]! / sum.baseStep),
      ]);
    }
  }
  printTable(
    'Table 3. The alternative design: K extra minibatch gradients per window, recomputed with tf.variableGrads',
    [
      'backend  design',
      'per step',
      'per window',
      ...WINDOW_LENGTHS.map((L) => `ms/step, L=${L}`),
      `% of step, L=${WINDOW_LENGTHS[WINDOW_LENGTHS.length - 1]}`,
    ],
    rows3,
    [
      `recompute: ${K_RECOMPUTE} × (forward + backward on a batch of ${BATCH}, read back, accumulate), median of ${s.recomputeReps};`,
      '  both designs also pay the same window close (Table 2b, median). L = window length in steps: 8 is the first',
      `  'auto' window, ${STEPS_PER_EPOCH} (one epoch) is where 'auto' windows settle in a long run.`,
      `  lower bound: ${K_RECOMPUTE} × the median forward+backward of a training step in fit (Table 1), i.e. the recompute`,
      '  design with free batch slicing, loss and accumulation. It also needs the training data outside fit, which a fit',
      '  callback never sees.',
    ],
  );

  // Table 4
  const cases = precisionCases();
  const rows4 = cases.map((c, i) => [
    c.label,
    c.exact.toPrecision(9),
    naiveFloat32(c.values).toPrecision(9),
    welfordFloat32(c.values).toPrecision(9),
    shiftedFloat64(c.values).toPrecision(9),
    ...results.map((b) => b.precisionJs[i]!.toPrecision(9)),
    ...results.map((b) => b.precisionTensor[i]!.toPrecision(9)),
  ]);
  printTable(
    'Table 4. Precision: sample variance of a stream, methods.md §4',
    [
      'data',
      'exact',
      'naive f32',
      'Welford f32',
      'ShiftedMoments f64',
      ...results.map((b) => `JsAccumulator ${b.backend}`),
      ...results.map((b) => `TensorAccumulator ${b.backend}`),
    ],
    rows4,
    [
      'naive f32: (Σx² − (Σx)²/n)/(n−1), every operation rounded with Math.fround; Welford f32 likewise (§4’s reference).',
      'ShiftedMoments f64: src/analysis/moments.ts as the JS accumulator uses it (float64 sums of deviations from the first value).',
      'JsAccumulator / TensorAccumulator: the library classes themselves, fed one-element float32 tensors, varianceTrace read back;',
      '  the tensor one keeps float32 shifted sums on the backend. exact: 30, or a float64 two-pass variance of the f32 values.',
    ],
  );
  const naiveOk = naiveFloat32(cases[1]!.values) === 0 && naiveFloat32(cases[0]!.values) === 32 && naiveFloat32(cases[2]!.values) === 0;
  const welfordOk = [0, 1, 2].every((i) => welfordFloat32(cases[i]!.values) === 30);
  console.log(
    `  float32 emulation reproduces methods.md §4 rows 4–6 (naive 0 / 32 / 0, Welford 30): ${naiveOk && welfordOk ? 'yes' : 'NO'}`,
  );

  longRunTable(results, s, summaries);

  // Tensors
  console.log('\nTensors (tf.memory().numTensors)');
  for (const b of results) console.log(`  ${b.backend}: ${b.tensorCounts.map(([k, n]) => `${k} ${n}`).join(', ')}`);
  const warnings = results.flatMap((b) => [...b.runs.flatMap((round) => round.map((r) => r.warnings)), b.long.auto.warnings]);
  console.log(`  monitor warnings during timed runs: ${warnings.reduce((a, w) => a + w, 0)}`);
  return summaries;
}

/** Table 5: the monitor's whole cost at default settings over one long run, measured inside that run. */
function longRunTable(results: BackendResult[], s: Settings, summaries: Summary[]): void {
  const cols = results.map((b) => {
    const r = b.long.auto;
    const none = b.long.none;
    const tap = sum0(r.tapMs); // no steps dropped in the long runs: every step's tap
    const slow = r.tapMs.filter((t) => t > 1);
    const closes = sum0(r.hooks.close);
    const rest = sum0(r.hooks.batchEnd) + r.hooks.otherMs;
    const hooks = closes + rest;
    const noise = r.noise ?? { calls: 0, ms: 0, each: [] };
    const first = noise.each[0] ?? 0;
    const training = r.fitMs - tap - hooks;
    const share = (x: number): string => pct(x / training);
    const withShare = (x: number): string => `${ms(x, 1)} ms  ${share(x)}`;
    const whole = (tap + hooks) / training;
    const wholeLessFirst = (tap + hooks - first) / training;
    const control = median(r.fwdBwdMs) / median(none.fwdBwdMs);
    const sum = summaries.find((x) => x.backend === b.backend)!;
    sum.whole = whole;
    sum.wholeLessFirst = wholeLessFirst;
    sum.longE2e = r.fitMs / none.fitMs;
    sum.longControl = control;
    return [
      `${r.steps} (${s.longEpochs})`,
      seconds(r.fitMs),
      withShare(tap),
      `${slow.length}, ${withShare(sum0(slow))}`,
      withShare(hooks),
      `${r.hooks.close.length}`,
      withShare(closes),
      `${noise.calls}`,
      withShare(noise.ms),
      withShare(first),
      ms(median(noise.each.slice(1)), 1),
      pct(noise.ms / r.fitMs),
      withShare(closes - noise.ms),
      withShare(sum0(r.hooks.batchEnd)),
      withShare(r.hooks.otherMs),
      seconds(training),
      `${pct(whole)}  ${mark(whole)}`,
      pct(wholeLessFirst),
      seconds(none.fitMs),
      ratio(r.fitMs / none.fitMs),
      ratio(control),
    ];
  });
  const labels = [
    'steps (epochs)',
    'fit wall time, monitored run',
    'Σ tap (outer − inner applyGradients timer)',
    '  steps whose tap took > 1 ms: count, Σ',
    'Σ hooks (timedHooks)',
    '  windows closed',
    '  Σ hook calls that closed a window',
    '    noise measurements (mon.noiseCost().calls)',
    '    Σ noise measurements (mon.noiseCost().ms)',
    '      the first one (at the first window)',
    '      the later ones: median ms',
    '      Σ noise / fit wall time (noise.budget, default 1 %)',
    '    closes less the noise measurements',
    '  batch-end hook calls that closed no window',
    '  train/epoch begin/end hook calls that closed no window',
    'training time = fit − Σ tap − Σ hooks',
    `whole monitor cost: (Σ tap + Σ hooks) / training time, ≤${TARGET * 100}%`,
    '  the same less the first noise measurement',
    'unmonitored run, same length: fit wall time',
    'end to end: fit monitored / unmonitored (noisy)',
    'fwd+bwd ratio, same pair (machine drift)',
  ];
  printTable(
    `Table 5. Whole cost over a long run: reference model, ${s.longEpochs} epochs (${s.longEpochs * STEPS_PER_EPOCH} steps), monitor at default settings`,
    ['quantity', ...results.map((b) => b.backend)],
    labels.map((label, i) => [label, ...cols.map((c) => c[i]!)]),
    [
      "One run per backend with monitor(model, { store: 'memory' }) and every other option at its default (window 'auto',",
      "  accumulator 'auto' → js, noise measurements on with noise.budget 1 %), all figures from that run on one clock;",
      '  no steps dropped. % = share of the training time, i.e. fit wall time less everything the monitor did in it.',
      'Σ tap: Table 2’s two timers, summed over every step. Σ hooks: every call of the monitor’s fit hooks, timed around it;',
      '  a close runs the noise measurement when one is due (inside closeWindow), so the closes contain them.',
      'the first one: the run’s first measurement, at its first window (the meter gives it only its minimum groups, as it holds the one-time',
      '  set-up); "less the first" shows how the rest amortises. mon.close() is not counted.',
      'unmonitored run: one fit of the same length just before, with no monitor: its ratio holds the machine’s drift',
      '  (several % on this shared machine; see the fwd+bwd ratio) and is not checked against the target.',
    ],
  );
}

// ---------------------------------------------------------------------------------------------

async function main(): Promise<void> {
  const s = readSettings();
  if (s === null) return;
  const t0 = now();
  setWasmPaths(wasmDir());
  console.log(
    `tidemark overhead bench: node ${process.version}, tfjs ${tf.version.tfjs}, ${availableParallelism()} cores, ` +
      `gc ${gc ? 'exposed' : 'not exposed'}${s.quick ? ', --quick' : ''}`,
  );
  console.log(
    `reference model: dense ${FEATURES}→${HIDDEN.join('→')}→${CLASSES} (tanh, softmax), SGD lr ${LR}, batch ${BATCH}, ` +
      `${SAMPLES} samples, categoricalCrossentropy; monitor: store 'memory', window 'auto', other options default`,
  );
  const results: BackendResult[] = [];
  for (const b of s.backends) results.push(await runBackend(b, s));
  progress('precision');
  for (const b of results) await runPrecision(b);
  const summaries = report(results, s);
  console.log('\nSummary against the targets (default settings)');
  for (const x of summaries) {
    const tapTarget = TAP_TARGET[x.backend] ?? TARGET;
    const pad = ' '.repeat(x.backend.length);
    console.log(
      `  ${x.backend}: whole monitor cost ${pct(x.whole)} of the training time over ${s.longEpochs} epochs ` +
        `(Table 5; ${pct(x.wholeLessFirst)} less the first noise measurement): ${mark(x.whole)} (≤ ${TARGET * 100} %)`,
    );
    console.log(
      `  ${pad}  tap ${pct(x.tapPct)} of a ${ms(x.baseStep)} ms step (Table 2, mean; median ${pct(x.tapMedianPct)}): ` +
        `${mark(x.tapPct, tapTarget)} (≤ ${tapTarget * 100} %)`,
    );
    console.log(
      `  ${pad}  end to end over ${s.longEpochs} epochs: fit ratio ${ratio(x.longE2e)} ` +
        `(one pair, noisy; fwd+bwd ratio ${ratio(x.longControl)}), not checked`,
    );
  }
  console.log(`\nbench wall time ${((now() - t0) / 1000).toFixed(1)} s`);
}

main().catch((e: unknown) => {
  console.error(e);
  process.exitCode = 1;
});
