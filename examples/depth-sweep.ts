/**
 * `npm run example:depth-sweep`: how the step where the gearbox classifier's training turns from drift to
 * diffusion moves with the network's depth. 1 to 6 hidden tanh layers of 16 units, each trained with 3
 * seeds on the same data (examples/gearbox-data.ts), every run monitored into one group of the store.
 * Afterwards the group is read back and the step of each run's first network diffusion-start marker is
 * fitted as a power law of the depth (the same sweep as `tidemark group NAME --sweep depth`); the command
 * and the page link to look at the group are printed. With --serve the store is served while the sweep
 * runs and until Ctrl-C (on --port, default 7341); without it, --port only goes into the printed command.
 *
 *   npx tsx examples/depth-sweep.ts [--quick] [--epochs N] [--out FILE] [--group NAME] [--serve] [--port N] [--verbose]
 *
 * --quick trains depths 1, 2 and 4 with 2 seeds for a few epochs: it checks the example works, and its
 * fit rests on few points. A seed sets the kernel initialisers and fit's shuffle (fit shuffles with
 * Math.random, which is swapped for a seeded generator during each fit), so a run repeats exactly; the
 * data (seed 1) is the same for every run, so the seeds vary only the training.
 */
import { resolve } from 'node:path';
import { fileURLToPath } from 'node:url';
import { parseArgs } from 'node:util';
import * as tf from '@tensorflow/tfjs';
import {
  DEFAULT_PORT,
  connectStore,
  defaultStore,
  groupReport,
  monitor,
  sweepOf,
  type GroupReport,
  type SweepReport,
} from '../src/index.js';
// The command line's text rendering of a group and a sweep (not part of the library's API).
import { renderGroup, renderSweep } from '../src/cli/group.js';
import { integerArgs, oncePerPress, serveWithFallback } from './cli-support.js';
import { buildGearboxModel, makeGearboxData, toTensors, withSeededShuffle } from './gearbox-data.js';

/**
 * Epochs: measured on a 2-core machine (cpu backend), every run's network diffusion-start was detected by
 * step 2000 (epoch 40 of 50 steps) and the full sweep took about 4.6 min at 60 epochs. A run whose
 * diffusion is detected only after its last epoch is left out of the fit, and the shallow runs are the
 * slowest to diffuse, so a shorter budget would bias the exponent; --epochs below about 45 risks that.
 */
const FULL = { depths: [1, 2, 3, 4, 5, 6], seeds: [1, 2, 3], epochs: 60 } as const;
const QUICK = { depths: [1, 2, 4], seeds: [1, 2], epochs: 45 } as const;
const SAMPLES = 4000;
const DATA_SEED = 1;
const VALIDATION_SPLIT = 0.2;
const BATCH_SIZE = 64;
const LEARNING_RATE = 0.01;
/**
 * Width rule: every hidden layer has 16 units, whatever the depth. A deeper network then differs from a
 * shallower one only by more identical 16→16 tanh layers, so depth is the one thing the sweep varies; a
 * taper (such as the demo's 24-16-8) would change the layers' widths along with their number. 16 is the
 * middle width of the demo's network.
 */
const WIDTH = 16;
/** Windows between two noise-scale measurements. */
const NOISE_EVERY = 5;

/** The hidden layer widths of the sweep's network of `depth` hidden layers. */
export function hiddenWidths(depth: number): number[] {
  return Array.from({ length: depth }, () => WIDTH);
}

export interface DepthSweepOptions {
  depths: readonly number[];
  seeds: readonly number[];
  epochs: number;
  /** A SQLite file. */
  store: string;
  group: string;
  /** Measurements generated (the last VALIDATION_SPLIT of them held out by fit). Default 4000. */
  samples?: number;
  /** Told before and after each run. */
  onRun?: (event: RunEvent) => void;
  /** Told of each problem a monitor absorbed. Default: printed. */
  onWarning?: (text: string) => void;
  /** Checked between runs and minibatches: true stops the current run and skips the rest. */
  stopRequested?: () => boolean;
}

export type RunEvent =
  | { kind: 'start'; index: number; total: number; depth: number; seed: number }
  | { kind: 'end'; index: number; total: number; depth: number; seed: number; runId: string; epochs: number; steps: number; diffusionStep: number | null; valAcc: number | null; seconds: number };

export interface DepthSweepResult {
  group: string;
  runIds: string[];
  /** Null only when the group holds no runs (nothing was trained). */
  report: GroupReport | null;
  sweep: SweepReport | null;
  /** True when stopRequested cut the sweep short. */
  stopped: boolean;
}

/** Trains every (depth, seed) into one group of `store`, then reads the group back with its depth sweep. */
export async function runDepthSweep(o: DepthSweepOptions): Promise<DepthSweepResult> {
  const data = makeGearboxData({ samples: o.samples ?? SAMPLES, seed: DATA_SEED });
  const { xs, ys } = toTensors(tf, data);
  const plan = o.depths.flatMap((depth) => o.seeds.map((seed) => ({ depth, seed })));
  const runIds: string[] = [];
  let stopped = false;
  try {
    for (const [index, { depth, seed }] of plan.entries()) {
      if (o.stopRequested?.() === true) {
        stopped = true;
        break;
      }
      o.onRun?.({ kind: 'start', index, total: plan.length, depth, seed });
      const started = Date.now();
      const model = buildGearboxModel(tf, { seed, learningRate: LEARNING_RATE, hidden: hiddenWidths(depth) });
      const mon = await monitor(model, {
        run: `depth${depth}-seed${seed}`,
        store: o.store,
        group: o.group,
        tags: { depth: String(depth), seed: String(seed), epochs: String(o.epochs) },
        // The noise scale at fixed weights every 5 windows (10 per run), rather than within the default 1 % time
        // budget, which on a network this small affords 1 to 3: a sweep compares it across runs.
        noise: { every: NOISE_EVERY },
        onWarning: (w) => (o.onWarning ?? ((t: string) => console.warn(t)))(`tidemark warning [${w.code}]: ${w.message}`),
      });
      runIds.push(mon.runId);
      let history: tf.History | null = null;
      let steps = 0;
      const watch = {
        onBatchEnd: async () => {
          steps++;
          if (o.stopRequested?.() === true) model.stopTraining = true;
        },
      };
      try {
        history = await withSeededShuffle(seed, () =>
          model.fit(xs, ys, {
            epochs: o.epochs,
            batchSize: BATCH_SIZE,
            shuffle: true,
            validationSplit: VALIDATION_SPLIT,
            verbose: 0,
            // Back to the event loop after every minibatch, so a Ctrl-C (and, with --serve, the page) is answered.
            yieldEvery: 'batch',
            callbacks: [watch, mon.callback],
          }),
        );
      } finally {
        await mon.close();
      }
      const diffusion = mon
        .markers()
        .filter((m) => m.kind === 'diffusion-start' && m.layer === null)
        .sort((a, b) => a.step - b.step)[0];
      const valAcc = history.history.val_acc?.at(-1);
      // The optimizer was passed to compile, so the model does not own it: disposed on its own (SGD keeps its rate as a tensor).
      model.optimizer.dispose();
      model.dispose();
      o.onRun?.({
        kind: 'end',
        index,
        total: plan.length,
        depth,
        seed,
        runId: mon.runId,
        epochs: history.epoch.length,
        steps,
        diffusionStep: diffusion?.step ?? null,
        valAcc: typeof valAcc === 'number' ? valAcc : null,
        seconds: (Date.now() - started) / 1000,
      });
      if (o.stopRequested?.() === true) {
        stopped = true;
        break;
      }
    }
  } finally {
    tf.dispose([xs, ys]);
  }
  const store = await connectStore(o.store, { readonly: true });
  try {
    const report = await groupReport(store, o.group);
    return { group: o.group, runIds, report, sweep: report === null ? null : sweepOf(report, 'depth', 'diffusion-start'), stopped };
  } finally {
    await store.close();
  }
}

// ---- command line -------------------------------------------------------------------------------------

const USAGE = 'usage: tsx examples/depth-sweep.ts [--quick] [--epochs N] [--out FILE] [--group NAME] [--serve] [--port N] [--verbose]';

function fail(message: string): never {
  console.error(`depth-sweep: ${message}`);
  console.error(USAGE);
  process.exit(2);
}

interface SweepArgs {
  quick: boolean;
  epochs: number;
  out: string;
  group: string;
  serve: boolean;
  port: number;
  portGiven: boolean;
  verbose: boolean;
}

function parseCli(): SweepArgs {
  let values;
  try {
    ({ values } = parseArgs({
      options: {
        quick: { type: 'boolean' },
        epochs: { type: 'string' },
        out: { type: 'string' },
        group: { type: 'string' },
        serve: { type: 'boolean' },
        port: { type: 'string' },
        verbose: { type: 'boolean' },
      },
      strict: true,
    }));
  } catch (e) {
    fail(e instanceof Error ? e.message : String(e));
  }
  const int = integerArgs(fail);
  const quick = values.quick === true;
  // The default store: $TIDEMARK_DB or tidemark.db, as the demo and monitor() use.
  const out = values.out ?? defaultStore();
  if (out === 'memory' || out.endsWith('.jsonl') || /^[a-z][a-z0-9+.-]*:\/\//i.test(out)) {
    fail(`--out must be a SQLite file (the group is read back from it); received '${out}'`);
  }
  if (values.group !== undefined && values.group.trim() === '') fail('--group must not be empty');
  // A fresh group per invocation, so a second sweep into the same store is not mixed with the first.
  const stamp = new Date().toISOString().replace(/\.\d+Z$/, '').replace(/[-:]/g, '').replace('T', '-');
  return {
    quick,
    epochs: int('epochs', values.epochs, quick ? QUICK.epochs : FULL.epochs, 1, 10_000),
    out,
    group: values.group ?? `depth-sweep-${stamp}`,
    serve: values.serve === true,
    port: int('port', values.port, DEFAULT_PORT, 0, 65535),
    portGiven: values.port !== undefined,
    verbose: values.verbose === true,
  };
}

async function cli(): Promise<void> {
  const args = parseCli();
  await tf.setBackend('cpu');
  await tf.ready();
  const plan = args.quick ? QUICK : FULL;
  const outPath = resolve(args.out);
  const total = plan.depths.length * plan.seeds.length;

  // Runs already in a group named with --group join the report; say so before they are mixed in.
  let before = 0;
  try {
    const existing = await connectStore(outPath, { readonly: true });
    try {
      before = (await existing.runs({ group: args.group, limit: 10_000 })).length;
    } finally {
      await existing.close();
    }
  } catch {
    // No store yet: the first monitor creates it.
  }

  const server = args.serve ? await serveWithFallback(outPath, args.port, args.portGiven, fail, (e) => console.error(`tidemark serve: ${e instanceof Error ? e.message : String(e)}`)) : null;
  const base = server?.url ?? `http://127.0.0.1:${args.port}`;
  const groupLink = `${base}/#/group/${encodeURIComponent(args.group)}`;

  let interrupted = false;
  let onSignal: () => void = () => {
    if (interrupted) {
      console.error('depth-sweep: stopped at once; the runs keep the windows stored so far.');
      process.exit(130);
    }
    interrupted = true;
    console.log('Ctrl-C: stopping after the current minibatch and skipping the remaining runs (press it again to quit at once).');
  };
  const signalled = oncePerPress(() => onSignal());
  process.on('SIGINT', signalled);
  process.on('SIGTERM', signalled);

  console.log(
    [
      'Depth sweep on the gearbox condition classifier (32 order-band energies -> 4 conditions)',
      `  depths ${plan.depths.join(', ')} (hidden tanh layers of ${WIDTH} units) × seeds ${plan.seeds.join(', ')} = ${total} runs,` +
        ` ${args.epochs} epochs each, plain SGD lr ${LEARNING_RATE}, batch ${BATCH_SIZE}`,
      `  ${SAMPLES} simulated measurements (data seed ${DATA_SEED}), ${Math.floor(SAMPLES * (1 - VALIDATION_SPLIT))} for training, the rest held out`,
      `  group ${args.group} in ${outPath}`,
      ...(args.quick ? ['  --quick: a check that the example runs; its fit rests on 6 runs and 3 depths'] : []),
      ...(before > 0 ? [`  the group already holds ${before} run${before === 1 ? '' : 's'}: the report below includes them`] : []),
      ...(server === null ? [] : [`  served live at ${groupLink}`]),
      '',
    ].join('\n'),
  );

  const started = Date.now();
  const result = await runDepthSweep({
    depths: plan.depths,
    seeds: plan.seeds,
    epochs: args.epochs,
    store: outPath,
    group: args.group,
    stopRequested: () => interrupted,
    onRun: (e) => {
      if (e.kind === 'start') return;
      const at = e.diffusionStep === null ? 'no network diffusion-start' : `network diffusion from step ${e.diffusionStep}`;
      const acc = e.valAcc === null ? '' : `, held-out acc ${e.valAcc.toFixed(3)}`;
      console.log(
        `  [${String(e.index + 1).padStart(String(e.total).length)}/${e.total}] depth ${e.depth} seed ${e.seed}: ` +
          `${e.epochs} epochs (${e.steps} steps), ${at}${acc}, ${e.seconds.toFixed(1)} s`,
      );
    },
    onWarning: (t) => console.log(`  ${t}`),
  });
  const minutes = (Date.now() - started) / 60_000;
  console.log(`\n${result.stopped ? 'Stopped on Ctrl-C after' : 'Trained'} ${result.runIds.length} of ${total} runs in ${minutes.toFixed(1)} min.\n`);

  if (result.report !== null && args.verbose) console.log(`${renderGroup(result.report)}\n`);
  if (result.sweep !== null) console.log(`${renderSweep(result.sweep)}\n`);
  const db = args.out.includes(' ') ? JSON.stringify(args.out) : args.out;
  const group = /^[\w.-]+$/.test(args.group) ? args.group : JSON.stringify(args.group);
  console.log(
    [
      'Caution: each diffusion step is an estimate from minibatch statistics and each run is one draw; with a',
      'handful of runs per depth the exponent is loose (read its intervals), and it describes this network on',
      'this data, not depth in general. Confirm on held-out data before it shapes a costly choice.',
      '',
      `The same report: npx tidemark group ${group} --sweep depth --db ${db}${args.verbose ? '' : '   (--verbose here prints it in full)'}`,
      server === null
        ? `To look at the group in the browser: npx tidemark serve --db ${db}${args.portGiven ? ` --port ${args.port}` : ''}   then open ${groupLink}`
        : `Group page: ${groupLink}`,
    ].join('\n'),
  );

  if (server !== null) {
    if (!interrupted) {
      console.log(`Still serving ${server.url}/ (Ctrl-C stops it).`);
      await new Promise<void>((done) => {
        onSignal = done;
      });
      console.log('\nStopping the server.');
    }
    onSignal = () => process.exit(130);
    let timer: NodeJS.Timeout | undefined;
    await Promise.race([
      server.close().catch((e: unknown) => console.error(`depth-sweep: closing the server: ${String(e)}`)),
      new Promise<void>((done) => {
        timer = setTimeout(done, 3000);
      }),
    ]);
    clearTimeout(timer);
  }
  process.off('SIGINT', signalled);
  process.off('SIGTERM', signalled);
  process.exitCode = interrupted ? 130 : 0;
}

// Run as a script (tsx examples/depth-sweep.ts); imported (the test), it only exports.
if (process.argv[1] !== undefined && resolve(process.argv[1]) === fileURLToPath(import.meta.url)) await cli();
