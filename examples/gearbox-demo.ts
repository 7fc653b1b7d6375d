/**
 * `npm run demo`: trains the gearbox condition classifier with tidemark attached and prints, for each
 * window of minibatches, how strongly each layer's gradients agree, the gradient noise scale and how far
 * the weights have moved from where they started.
 *
 *   npx tsx examples/gearbox-demo.ts [--epochs N] [--seed N] [--lr X] [--out FILE] [--exit]
 */
import { resolve } from 'node:path';
import { parseArgs } from 'node:util';
import * as tf from '@tensorflow/tfjs';
import cliProgress from 'cli-progress';
import { defaultStore, monitor, type LayerStats, type Marker, type WindowRecord } from '../src/index.js';
import { buildGearboxModel, makeGearboxData, toTensors } from './gearbox-data.js';

const DEFAULT_EPOCHS = 120;
const BATCH_SIZE = 64;
const SAMPLES = 4000;
const VALIDATION_SPLIT = 0.2;
const LABEL_NOISE = 0.08;
/** Readings this close to the floor (in dB) are indistinguishable from pure minibatch noise. */
const NEAR_FLOOR_DB = 3;

function fail(message: string): never {
  console.error(`gearbox-demo: ${message}`);
  console.error('usage: tsx examples/gearbox-demo.ts [--epochs N] [--seed N] [--lr X] [--out FILE] [--exit]');
  process.exit(2);
}

function parseCli(): { epochs: number; seed: number; lr: number; out: string } {
  let values;
  try {
    ({ values } = parseArgs({
      options: {
        epochs: { type: 'string' },
        seed: { type: 'string' },
        lr: { type: 'string' },
        out: { type: 'string' },
        // Training ends the process already; the flag is accepted so scripts can ask for it explicitly.
        exit: { type: 'boolean' },
      },
      strict: true,
    }));
  } catch (e) {
    fail(e instanceof Error ? e.message : String(e));
  }
  const int = (name: string, raw: string | undefined, fallback: number, min: number): number => {
    if (raw === undefined) return fallback;
    const n = Number(raw);
    if (!Number.isInteger(n) || n < min) fail(`--${name} must be an integer ≥ ${min}; received '${raw}'`);
    return n;
  };
  const lr = values.lr === undefined ? 0.01 : Number(values.lr);
  if (!(lr > 0 && lr < 10)) fail(`--lr must be a positive number below 10; received '${values.lr}'`);
  // The default store: $TIDEMARK_DB or tidemark.db; a path ending in .jsonl writes JSON Lines instead.
  const out = values.out ?? defaultStore();
  return {
    epochs: int('epochs', values.epochs, DEFAULT_EPOCHS, 1),
    seed: int('seed', values.seed, 1, 0),
    lr,
    out,
  };
}

// ---- formatting -------------------------------------------------------------------------------------

function signedDb(db: number): string {
  if (!Number.isFinite(db)) return db < 0 ? '-inf' : 'n/a';
  return `${db >= 0 ? '+' : ''}${db.toFixed(1)}`;
}

/** Noise scales span decades; three significant figures with a k/M suffix keep the column narrow. */
function compact(value: number | null): string {
  if (value === null || !Number.isFinite(value)) return '-';
  const abs = Math.abs(value);
  if (abs >= 1e6) return `${(value / 1e6).toPrecision(3)}M`;
  if (abs >= 1e3) return `${(value / 1e3).toPrecision(3)}k`;
  return abs >= 100 ? value.toFixed(0) : value.toPrecision(3);
}

function floorDb(w: WindowRecord): number {
  return w.snr_floor > 0 ? 20 * Math.log10(w.snr_floor) : -Infinity;
}

const COLUMNS = { layer: 14, snr: 8, noise: 12, travel: 9, exponent: 9 };

function row(name: string, s: LayerStats, floor: number, phase: string): string {
  const nearFloor = Number.isFinite(floor) && s.grad_snr_db <= floor + NEAR_FLOOR_DB;
  return (
    `   ${name.padEnd(COLUMNS.layer)}` +
    signedDb(s.grad_snr_db).padStart(COLUMNS.snr) +
    compact(s.noise_scale).padStart(COLUMNS.noise) +
    s.weight_travel.toFixed(3).padStart(COLUMNS.travel) +
    (s.travel_exponent === null ? '-' : s.travel_exponent.toFixed(2)).padStart(COLUMNS.exponent) +
    `  ${phase.padEnd(12)}` +
    (nearFloor ? ' near floor' : '')
  );
}

function describeLogs(logs: Record<string, number>): string {
  const shown: string[] = [];
  for (const key of ['loss', 'acc', 'val_loss', 'val_acc']) {
    const v = logs[key];
    if (v !== undefined) shown.push(`${key} ${v.toFixed(key.endsWith('acc') ? 3 : 4)}`);
  }
  return shown.join('  ');
}

function describeMarker(m: Marker): string {
  const where = m.layer ?? 'network';
  if (m.kind === 'drift-start' || m.kind === 'diffusion-start') {
    return `${where}: ${m.kind === 'drift-start' ? 'drift' : 'diffusion'} since about step ${m.step} (known at step ${m.detected_step}, confidence ${m.confidence.toFixed(2)})`;
  }
  if (m.kind === 'advice') return `advice changed to ${String(m.details.verdict)}`;
  if (m.kind === 'stopped') return 'training stopped on the advice';
  return `${where}: ${m.kind} at step ${m.step}`;
}

function windowTable(w: WindowRecord, epochs: number, phases: Record<string, string>, network: string): string {
  const floor = floorDb(w);
  const floorText = Number.isFinite(floor)
    ? `SNR floor ${signedDb(floor)} dB`
    : 'SNR floor none (the window spans a whole epoch)';
  const epoch = w.epoch === null ? '' : `  epoch ${w.epoch + 1}/${epochs}`;
  const m = w.batches_per_epoch === null ? '' : ` of ${w.batches_per_epoch}`;
  const lines = [
    `── window ${w.index + 1}  steps ${w.first_step}-${w.step}${epoch}  K ${w.batches}${m}  ${describeLogs(w.logs)}`,
    `   ${floorText}`,
    `   ${'layer'.padEnd(COLUMNS.layer)}${'SNR dB'.padStart(COLUMNS.snr)}${'noise scale'.padStart(COLUMNS.noise)}` +
      `${'travel'.padStart(COLUMNS.travel)}${'exponent'.padStart(COLUMNS.exponent)}  phase`,
  ];
  for (const [name, stats] of Object.entries(w.layers)) lines.push(row(name, stats, floor, phases[name] ?? 'undetermined'));
  lines.push(row('(network)', w.network, floor, network));
  return lines.join('\n');
}

const LEGEND = [
  'Columns, per layer and per window of K minibatches:',
  '  SNR dB       mean gradient against its minibatch-to-minibatch spread; above 0 the minibatches',
  '               agree (drift), below 0 they mostly cancel (diffusion)',
  '  noise scale  batch size at which gradient noise would equal the signal; "-" when the signal',
  '               estimate is not positive',
  '  travel       distance of the weights from where they started',
  '  exponent     local slope of log travel against log step: near 1 while drifting, 1/2 for a',
  '               random walk, lower when the wandering is confined',
  '  phase        drift or diffusion as the detector currently judges it (a statistical estimate)',
  '  near floor   within 3 dB of what pure noise would read for this window',
].join('\n');

// ---- the run ------------------------------------------------------------------------------------------

const args = parseCli();
await tf.setBackend('cpu');
await tf.ready();

const started = Date.now();
const data = makeGearboxData({ samples: SAMPLES, seed: args.seed, labelNoise: LABEL_NOISE });
const { xs, ys } = toTensors(tf, data);
const model = buildGearboxModel(tf, { seed: args.seed, learningRate: args.lr });
const trainCount = Math.floor(SAMPLES * (1 - VALIDATION_SPLIT));
const stepsPerEpoch = Math.ceil(trainCount / BATCH_SIZE);
const totalSteps = stepsPerEpoch * args.epochs;

const interactive = process.stdout.isTTY === true;
const bars = interactive
  ? new cliProgress.MultiBar({
      format: ' training {bar} {percentage}%  epoch {epoch}/{epochs}  loss {loss}  {eta_formatted} left',
      barCompleteChar: '■',
      barIncompleteChar: '·',
      barsize: 20,
      hideCursor: true,
      clearOnComplete: true,
      stopOnComplete: false,
      etaBuffer: 200,
      // A logged table clears the bar's line; without this an unchanged bar would not be drawn again.
      forceRedraw: true,
      // Keep the terminal wrapping long table lines; the bar itself is cut to the terminal width.
      linewrap: true,
    })
  : null;
/** Lines go above the bar when there is one, straight to stdout otherwise. */
function say(text: string): void {
  if (bars === null || !bars.isActive) {
    console.log(text);
    return;
  }
  bars.log(`${text}\n`);
  // Render now: fit rarely yields to the timer that would otherwise flush the log.
  bars.update();
}

const outPath = resolve(args.out);
const mon = await monitor(model, {
  run: 'gearbox-demo',
  store: outPath,
  window: 'auto',
  tags: { seed: String(args.seed), lr: String(args.lr), epochs: String(args.epochs) },
  onWarning: (w) => say(`tidemark warning [${w.code}]: ${w.message}`),
});

say(
  [
    'Gearbox condition classifier: 32 order-band energies -> healthy | bearing wear | gear tooth crack | shaft misalignment',
    `${SAMPLES} simulated measurements (seed ${args.seed}, ${Math.round(LABEL_NOISE * 100)}% mislabelled), ${trainCount} for training, the rest held out`,
    `network 32-24-16-8-4 tanh/softmax, plain SGD lr ${args.lr}, batch ${BATCH_SIZE}, ${args.epochs} epochs of ${stepsPerEpoch} steps`,
    '',
    LEGEND,
    '',
  ].join('\n'),
);

// Where each layer's current run of windows below 0 dB began; a single early dip does not count.
const belowZeroSince = new Map<string, WindowRecord | null>();
let markersShown = 0;
mon.onWindow((w) => {
  const phases = mon.phase();
  const lines = [windowTable(w, args.epochs, phases.layers, phases.network)];
  const markers = mon.markers();
  for (const m of markers.slice(markersShown)) lines.push(`   ▸ ${describeMarker(m)}`);
  markersShown = markers.length;
  const advice = mon.advice();
  if (advice !== null) lines.push(`   advice: ${advice.verdict}. ${advice.reason}`);
  say(`${lines.join('\n')}\n`);
  for (const [name, s] of [...Object.entries(w.layers), ['(network)', w.network] as const]) {
    if (s.grad_snr_db >= 0) belowZeroSince.set(name, null);
    else if (!belowZeroSince.get(name)) belowZeroSince.set(name, w);
  }
});

let epochNow = 0;
let lastLoss = Number.NaN;
const progress = {
  onEpochBegin: async (epoch: number) => {
    epochNow = epoch;
  },
  onBatchEnd: async (_batch: number, logs?: tf.Logs) => {
    if (logs?.loss !== undefined) lastLoss = logs.loss;
    bar?.increment(1, { epoch: epochNow + 1, epochs: args.epochs, loss: lastLoss.toFixed(4) });
  },
};

// Started only now, so a failure while setting up never leaves the terminal with a hidden cursor.
const bar = bars?.create(totalSteps, 0, { epoch: 1, epochs: args.epochs, loss: '-' }) ?? null;
let history: tf.History;
try {
  history = await model.fit(xs, ys, {
    epochs: args.epochs,
    batchSize: BATCH_SIZE,
    shuffle: true,
    validationSplit: VALIDATION_SPLIT,
    verbose: 0,
    // Progress first, so the bar has counted a batch before a window closing on it is printed.
    callbacks: [progress, mon.callback],
  });
} finally {
  await mon.close();
  bars?.stop();
}

// ---- summary --------------------------------------------------------------------------------------

const last = (key: string): string => {
  const series = history.history[key];
  const v = series?.[series.length - 1];
  return typeof v === 'number' ? v.toFixed(key.endsWith('acc') ? 3 : 4) : '-';
};

// The held-out part is the tail fit set aside; its true conditions are known here, unlike in the field.
const heldOut = tf.tidy(() => {
  const n = SAMPLES - trainCount;
  const predicted = (model.predict(xs.slice([trainCount, 0], [n, -1])) as tf.Tensor).argMax(1).dataSync();
  let truth = 0;
  for (let i = 0; i < n; i++) if (predicted[i] === data.cleanLabels[trainCount + i]) truth++;
  return { truth: truth / n };
});
xs.dispose();
ys.dispose();

const seconds = ((Date.now() - started) / 1000).toFixed(1);
const summary = [
  `Finished ${args.epochs} epochs (${totalSteps} steps) in ${seconds} s.`,
  `  training    loss ${last('loss')}  acc ${last('acc')}`,
  `  held out    loss ${last('val_loss')}  acc ${last('val_acc')} against the recorded labels, ` +
    `${heldOut.truth.toFixed(3)} against the true conditions`,
  '',
  'Below 0 dB in every window since:',
];
for (const name of [...model.layers.map((l) => l.name), '(network)']) {
  const w = belowZeroSince.get(name);
  summary.push(
    `  ${name.padEnd(COLUMNS.layer)}` +
      (w === undefined || w === null
        ? 'not yet: the last window read 0 dB or more'
        : `steps ${w.first_step}-${w.step}${w.epoch === null ? '' : `, epoch ${w.epoch + 1}`}`),
  );
}
const phase = mon.phase();
summary.push(
  '',
  `Phase detector: network ${phase.network}; ` +
    Object.entries(phase.layers)
      .map(([k, v]) => `${k} ${v}`)
      .join(', '),
  `Stored ${mon.windows().length} windows of run ${mon.runId} in ${outPath}`,
  outPath.endsWith('.jsonl')
    ? `Read it back with: npx tidemark summary ${args.out}`
    : `Read it back with: npx tidemark runs --db ${args.out}   and   npx tidemark show ${mon.runId.slice(0, 8)} --db ${args.out}`,
  '',
  'Caution: these numbers are statistical estimates from minibatches, not guarantees about the model;' +
    ' confirm any decision to stop training on held-out data.',
);
console.log(summary.join('\n'));
