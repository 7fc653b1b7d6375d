/**
 * `npm run demo`: serves the demo's store with the live page, then trains the gearbox condition classifier
 * with tidemark attached. The terminal prints one line per window of minibatches (the network's gradient
 * signal-to-noise and its phase), the phase markers, each layer's information estimates on a held-out probe
 * set in the windows where the activation probe ran, the advice when it changes and a summary; the page at
 * the printed URL shows every layer's numbers as the windows land. After training the page keeps serving
 * until Ctrl-C, unless --exit is given.
 *
 *   npx tsx examples/gearbox-demo.ts [--epochs N] [--seed N] [--lr X] [--out FILE] [--port N] [--exit] [--tables]
 */
import { resolve } from 'node:path';
import { parseArgs } from 'node:util';
import * as tf from '@tensorflow/tfjs';
import cliProgress from 'cli-progress';
import {
  DEFAULT_PORT,
  analysis,
  defaultStore,
  monitor,
  type LayerStats,
  type Marker,
  type RunningServer,
  type WindowRecord,
} from '../src/index.js';
import { integerArgs, oncePerPress, serveWithFallback } from './cli-support.js';
import { buildGearboxModel, makeGearboxData, sliceGearboxData, toTensors } from './gearbox-data.js';

const DEFAULT_EPOCHS = 120;
const BATCH_SIZE = 64;
const SAMPLES = 4000;
const VALIDATION_SPLIT = 0.2;
const LABEL_NOISE = 0.08;
/** Further measurements generated after the SAMPLES, never trained or validated on: the probe set. */
const PROBE_ROWS = 1024;
/** Equal-width bins per unit of the probe's binned estimates (tidemark's default, stated so the caution can cite it). */
const PROBE_BINS = 30;
/** Readings this close to the floor (in dB) are indistinguishable from pure minibatch noise. */
const NEAR_FLOOR_DB = 3;
/** Said wherever the demo prints advice. */
const ADVICE_CAUTION = 'an estimate from minibatch statistics; confirm on held-out data before acting on it';
/** The advice's reason with the caution once: a stop verdict's reason already carries it. */
const withCaution = (reason: string): string => (/held-out/.test(reason) ? reason : `${reason} (${ADVICE_CAUTION})`);
const USAGE = 'usage: tsx examples/gearbox-demo.ts [--epochs N] [--seed N] [--lr X] [--out FILE] [--port N] [--exit] [--tables]';

function fail(message: string): never {
  console.error(`gearbox-demo: ${message}`);
  console.error(USAGE);
  process.exit(2);
}

interface DemoArgs {
  epochs: number;
  seed: number;
  lr: number;
  out: string;
  /** Port for the live page; `portGiven` when --port named it. */
  port: number;
  portGiven: boolean;
  /** Stop after training instead of serving until Ctrl-C. */
  exit: boolean;
  /** Print every window's full per-layer table. */
  tables: boolean;
}

function parseCli(): DemoArgs {
  let values;
  try {
    ({ values } = parseArgs({
      options: {
        epochs: { type: 'string' },
        seed: { type: 'string' },
        lr: { type: 'string' },
        out: { type: 'string' },
        port: { type: 'string' },
        exit: { type: 'boolean' },
        tables: { type: 'boolean' },
      },
      strict: true,
    }));
  } catch (e) {
    fail(e instanceof Error ? e.message : String(e));
  }
  const int = integerArgs(fail);
  const lr = values.lr === undefined ? 0.01 : Number(values.lr);
  if (!(lr > 0 && lr < 10)) fail(`--lr must be a positive number below 10; received '${values.lr}'`);
  // The default store: $TIDEMARK_DB or tidemark.db; a path ending in .jsonl writes JSON Lines instead.
  const out = values.out ?? defaultStore();
  return {
    epochs: int('epochs', values.epochs, DEFAULT_EPOCHS, 1),
    seed: int('seed', values.seed, 1, 0),
    lr,
    out,
    port: int('port', values.port, DEFAULT_PORT, 0, 65535),
    portGiven: values.port !== undefined,
    exit: values.exit === true,
    tables: values.tables === true,
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

function row(w: WindowRecord, name: string, s: LayerStats, floor: number, phase: string): string {
  const nearFloor = Number.isFinite(floor) && s.grad_snr_db <= floor + NEAR_FLOOR_DB;
  return (
    `   ${name.padEnd(COLUMNS.layer)}` +
    signedDb(analysis.displacementLevelDb(w, s)).padStart(COLUMNS.snr) +
    signedDb(s.grad_snr_db).padStart(COLUMNS.snr) +
    compact(s.noise_scale).padStart(COLUMNS.noise) +
    s.weight_travel.toFixed(3).padStart(COLUMNS.travel) +
    (s.travel_exponent === null ? '-' : s.travel_exponent.toFixed(2)).padStart(COLUMNS.exponent) +
    `  ${phase.padEnd(12)}` +
    (nearFloor ? ' SNR near floor' : '')
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
  if (m.kind === 'compression-start') {
    const d = m.details;
    const fall =
      typeof d.peak_bits === 'number' && typeof d.current_bits === 'number'
        ? `, peak ${d.peak_bits.toFixed(2)}, now ${d.current_bits.toFixed(2)} bits`
        : '';
    return `${where}: binned I(X;T) falling since about step ${m.step} (known at step ${m.detected_step}${fall}, confidence ${m.confidence.toFixed(2)}; an estimate)`;
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
    `   ${'layer'.padEnd(COLUMNS.layer)}${'level dB'.padStart(COLUMNS.snr)}${'SNR dB'.padStart(COLUMNS.snr)}${'noise scale'.padStart(COLUMNS.noise)}` +
      `${'travel'.padStart(COLUMNS.travel)}${'exponent'.padStart(COLUMNS.exponent)}  phase`,
  ];
  for (const [name, stats] of Object.entries(w.layers)) lines.push(row(w, name, stats, floor, phases[name] ?? 'undetermined'));
  lines.push(row(w, '(network)', w.network, floor, network));
  return lines.join('\n');
}

/** One line per window when the full tables are off: the page carries every layer's numbers. */
function windowLine(w: WindowRecord, epochs: number, network: string): string {
  const epoch = w.epoch === null ? '' : `  epoch ${w.epoch + 1}/${epochs}`;
  return `── window ${w.index + 1}  steps ${w.first_step}-${w.step}${epoch}  ${describeLogs(w.logs)}  network level ${signedDb(analysis.displacementLevelDb(w, w.network))} dB ${network}`;
}

// ---- probe block -------------------------------------------------------------------------------------

/** Marks a value that says nothing: every probe example has its own bin (or, for the bounds, stays apart through the noise). */
const SAT_MARK = '*';
const SAT_LEGEND = `   ${SAT_MARK} every probe example in its own bin (bounds: all still apart through the noise): says nothing`;
const PROBE_COLUMNS = { mi: 9, linear: 11, bounds: 13, limit: 10 };

function isProbed(s: LayerStats): boolean {
  return s.mi_input !== undefined;
}

function bits(value: number | undefined, saturated: boolean): string {
  if (value === undefined || !Number.isFinite(value)) return '- ';
  return `${value.toFixed(2)}${saturated ? SAT_MARK : ' '}`;
}

/** A layer's probe values on one line; `marked` is set when any of them carries the saturation mark. */
function probeRow(name: string, s: LayerStats): { text: string; marked: boolean } {
  const binnedSat = s.mi_saturated === 1;
  const boundsSat = s.mi_bounds_saturated === 1;
  const bounds =
    s.mi_input_lower === undefined || s.mi_input_upper === undefined
      ? '- '
      : `${s.mi_input_lower.toFixed(2)}–${s.mi_input_upper.toFixed(2)}${boundsSat ? SAT_MARK : ' '}`;
  const limit = s.act_saturation === undefined || !Number.isFinite(s.act_saturation) ? '-' : `${(100 * s.act_saturation).toFixed(1)}%`;
  // The noise-regularised values first: on the hidden layers the binned ones sit at log2(rows) and say nothing.
  return {
    text:
      `   ${name.padEnd(COLUMNS.layer)}` +
      bounds.padStart(PROBE_COLUMNS.bounds) +
      bits(s.mi_label_pairwise, boundsSat).padStart(PROBE_COLUMNS.mi) +
      bits(s.mi_label_linear, false).padStart(PROBE_COLUMNS.linear) +
      bits(s.mi_input, binnedSat).padStart(PROBE_COLUMNS.mi) +
      bits(s.mi_label, binnedSat).padStart(PROBE_COLUMNS.mi) +
      limit.padStart(PROBE_COLUMNS.limit),
    marked: binnedSat || boundsSat,
  };
}

function probeHeader(title: string): string {
  return (
    `   ${title.padEnd(COLUMNS.layer)}` +
    'I(X;T) '.padStart(PROBE_COLUMNS.bounds) +
    'I(T;Y) '.padStart(PROBE_COLUMNS.mi) +
    // The linear read-out's lower bound on I(T;Y): no noise, no saturation.
    'Y ≥ linear '.padStart(PROBE_COLUMNS.linear) +
    'binned X '.padStart(PROBE_COLUMNS.mi) +
    'binned Y '.padStart(PROBE_COLUMNS.mi) +
    'at limit'.padStart(PROBE_COLUMNS.limit)
  );
}

/** The probe lines of a window, or none when the probe did not run in it. */
function probeBlock(w: WindowRecord): string[] {
  const probed = Object.entries(w.layers).filter(([, s]) => isProbed(s));
  if (probed.length === 0) return [];
  const lines = [probeHeader('probe, bits')];
  let marked = false;
  for (const [name, s] of probed) {
    const r = probeRow(name, s);
    lines.push(r.text);
    marked ||= r.marked;
  }
  if (marked) lines.push(SAT_LEGEND);
  return lines;
}

/** The columns of the full tables (--tables). */
const TABLE_LEGEND = [
  'Columns, per layer and per window of K minibatches:',
  '  level dB     how far the weights moved along the mean gradient against how far minibatch noise',
  '               moved them over the window; above 0 drift, below 0 diffusion (what the phase follows)',
  '  SNR dB       the classic ratio of the mean gradient to its minibatch-to-minibatch spread; it',
  '               compares the batch with the noise scale, so it depends on the batch size',
  '  noise scale  batch size at which gradient noise would equal the signal, measured at the window\'s',
  '               end with the weights held still; "-" where no measurement ran or it was unresolved',
  '  travel       distance of the weights from where they started',
  '  exponent     local slope of log travel against log step: near 1 while drifting, 1/2 for a',
  '               random walk, lower when the wandering is confined',
  '  phase        drift or diffusion as the detector currently judges it (a statistical estimate)',
  '  SNR near floor  the SNR is within 3 dB of what pure noise would read for this window',
];
/** The one-line windows (default). */
const LINE_LEGEND = [
  'One line per window of minibatches: the logs at its end, then the whole network\'s phase level (how',
  'far the weights moved along the mean gradient against how far minibatch noise moved them over the',
  'window; above 0 dB drift, below 0 dB diffusion) and its phase as the detector currently judges it (a',
  'statistical estimate). The page shows every layer; --tables prints every layer here too.',
];
const PROBE_LEGEND = [
  `In the windows where tidemark ran its activation probe, a probe block follows: ${PROBE_ROWS} held-out`,
  'measurements run through the network, values in bits:',
  '  I(X;T)       lower–upper bounds on what the layer output tells about the input once Gaussian noise',
  "               of 0.2 × the layer's spread is added to it (Kolchinsky & Tracey pairwise estimate)",
  '  I(T;Y)       the matching estimate of what the noisy output tells about the recorded condition',
  '  Y ≥ linear   at least this much about the condition, read by a linear classifier from the layer itself',
  '               (no noise, never saturated; Barber & Agakov bound, scored on probe rows it was not fitted to)',
  `  binned X, Y  the same two by plug-in binning (${PROBE_BINS} bins per unit), the classic picture`,
  '  at limit     share of activations pinned near the ends of their range (tanh ±1, softmax 0/1)',
  `  ${SAT_MARK}            saturated: every probe example in its own bin, so the value says nothing (on the`,
  '               bounds: the noise still leaves every example apart)',
];

// ---- the run ------------------------------------------------------------------------------------------

const args = parseCli();
await tf.setBackend('cpu');
await tf.ready();

const started = Date.now();
// The probe rows come after the SAMPLES and do not enter the scaling, so the first SAMPLES rows are the
// same as without them; fit never sees the probe rows (validationSplit takes the tail of what it gets).
const generated = makeGearboxData({ samples: SAMPLES + PROBE_ROWS, seed: args.seed, labelNoise: LABEL_NOISE, standardiseOn: SAMPLES });
const data = sliceGearboxData(generated, 0, SAMPLES);
const { xs, ys } = toTensors(tf, data);
// Labelled with the recorded conditions, mislabelling included, as a held-out set would be in practice.
const probeSet = toTensors(tf, sliceGearboxData(generated, SAMPLES, SAMPLES + PROBE_ROWS));
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

/**
 * Serves the store the demo writes, so the page can follow the run live. A port in use falls back to a
 * free one; the page needs a SQLite store, so a .jsonl output is written without it.
 */
async function serveStore(): Promise<RunningServer | null> {
  if (outPath.endsWith('.jsonl')) {
    console.log(`The live page reads a SQLite store; ${args.out} is JSON Lines, so this run is written without it.\n`);
    return null;
  }
  return serveWithFallback(outPath, args.port, args.portGiven, fail, (e) => say(`tidemark serve: ${e instanceof Error ? e.message : String(e)}`));
}

const server = await serveStore();
const mon = await monitor(model, {
  run: 'gearbox-demo',
  store: outPath,
  window: 'auto',
  // How often the probe runs is left to tidemark; the windows where it ran carry its values.
  probe: { x: probeSet.xs, y: probeSet.ys, bins: PROBE_BINS },
  // The demo trains for about 20 s. At the default 1 % budget the fixed-weight noise measurement (about 0.1 s)
  // would run once, at the first window, and the batch-size sentence would quote step 8 of 6,000; 4 % lets it
  // measure through the run. Long runs keep the default.
  noise: { budget: 0.04 },
  tags: { seed: String(args.seed), lr: String(args.lr), epochs: String(args.epochs) },
  onWarning: (w) => say(`tidemark warning [${w.code}]: ${w.message}`),
});
const runLink = server === null ? null : `${server.url}/#/run/${encodeURIComponent(mon.runId)}`;

/**
 * Ctrl-C (or SIGTERM) asks training to stop after the current minibatch; the monitor then closes and the
 * run is stored as far as it got. A second one during training quits at once. After training, while the
 * page is still served, it ends the demo.
 */
let interrupted = false;
let onSignal: () => void = () => {
  if (interrupted) {
    bars?.stop();
    console.error('gearbox-demo: stopped at once; the run keeps the windows stored so far.');
    process.exit(130);
  }
  interrupted = true;
  model.stopTraining = true;
  say('Ctrl-C: stopping after the current minibatch (press it again to quit at once).');
};
const signalled = oncePerPress(() => onSignal());
process.on('SIGINT', signalled);
process.on('SIGTERM', signalled);

say(
  [
    'Gearbox condition classifier: 32 order-band energies -> healthy | bearing wear | gear tooth crack | shaft misalignment',
    `${SAMPLES} simulated measurements (seed ${args.seed}, ${Math.round(LABEL_NOISE * 100)}% mislabelled), ${trainCount} for training, the rest held out;`,
    `  ${PROBE_ROWS} more, never trained on, form the activation probe set`,
    `network 32-24-16-8-4 tanh/softmax, plain SGD lr ${args.lr}, batch ${BATCH_SIZE}, ${args.epochs} epochs of ${stepsPerEpoch} steps`,
    '',
    ...(args.tables ? TABLE_LEGEND : LINE_LEGEND),
    ...PROBE_LEGEND,
    '',
    runLink === null
      ? `Run ${mon.runId} is stored in ${outPath}.`
      : `Live view: ${runLink}\n  open it in a browser; the windows appear there as they land (Ctrl-C stops training).`,
    '',
  ].join('\n'),
);

// Where each layer's current run of windows below 0 dB began; a single early dip does not count.
const belowZeroSince = new Map<string, WindowRecord | null>();
let markersShown = 0;
/** The latest probe values per layer and the window they came from, for the summary. */
const lastProbe = new Map<string, { stats: LayerStats; window: WindowRecord }>();
let probeWindows = 0;
let windowsSeen = 0;
/**
 * The advice last printed, its numbers blanked: printed again only when the verdict or the kind of reason
 * changes, not each time a count in the reason moves on.
 */
let adviceShown: string | null = null;
mon.onWindow((w) => {
  windowsSeen++;
  const phases = mon.phase();
  const lines = [
    args.tables ? windowTable(w, args.epochs, phases.layers, phases.network) : windowLine(w, args.epochs, phases.network),
    ...probeBlock(w),
  ];
  let probed = false;
  for (const [name, s] of Object.entries(w.layers)) {
    if (!isProbed(s)) continue;
    lastProbe.set(name, { stats: s, window: w });
    probed = true;
  }
  if (probed) probeWindows++;
  const markers = mon.markers();
  for (const m of markers.slice(markersShown)) lines.push(`   ▸ ${describeMarker(m)}`);
  markersShown = markers.length;
  const advice = mon.advice();
  const adviceKey = advice === null ? null : `${advice.verdict}. ${advice.reason.replace(/[0-9.]+/g, '#')}`;
  if (advice !== null && (args.tables || adviceKey !== adviceShown)) {
    lines.push(`   advice: ${advice.verdict}. ${withCaution(advice.reason)}`);
    adviceShown = adviceKey;
  }
  // The full tables read better with a blank line between windows; the one-liners without.
  say(args.tables ? `${lines.join('\n')}\n` : lines.join('\n'));
  for (const [name, s] of [...Object.entries(w.layers), ['(network)', w.network] as const]) {
    if (analysis.displacementLevelDb(w, s) >= 0) belowZeroSince.set(name, null);
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
    // fit may clear the flag when it starts; a Ctrl-C that came before is honoured here.
    if (interrupted) model.stopTraining = true;
    bar?.increment(1, { epoch: epochNow + 1, epochs: args.epochs, loss: lastLoss.toFixed(4) });
  },
};

// Started only now, so a failure while setting up never leaves the terminal with a hidden cursor.
const bar = bars?.create(totalSteps, 0, { epoch: 1, epochs: args.epochs, loss: '-' }) ?? null;
let history: tf.History | null = null;
try {
  if (!interrupted) {
    history = await model.fit(xs, ys, {
      epochs: args.epochs,
      batchSize: BATCH_SIZE,
      shuffle: true,
      validationSplit: VALIDATION_SPLIT,
      verbose: 0,
      // Back to the event loop after every minibatch, so the page's requests are answered and a Ctrl-C is
      // seen at once: tsx, which runs the demo, kills a child that does not acknowledge a signal within
      // tens of milliseconds.
      yieldEvery: 'batch',
      // Progress first, so the bar has counted a batch before a window closing on it is printed.
      callbacks: [progress, mon.callback],
    });
  }
} finally {
  await mon.close();
  bars?.stop();
}

// ---- summary --------------------------------------------------------------------------------------

const last = (key: string): string => {
  const series = history?.history[key];
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
tf.dispose([xs, ys, probeSet.xs, probeSet.ys]);

const seconds = ((Date.now() - started) / 1000).toFixed(1);
const summary = [
  interrupted
    ? `Stopped on Ctrl-C after ${history?.epoch.length ?? 0} of ${args.epochs} epochs (${mon.windows().at(-1)?.step ?? 0} steps) in ${seconds} s.`
    : `Finished ${args.epochs} epoch${args.epochs === 1 ? '' : 's'} (${totalSteps} steps) in ${seconds} s.`,
  `  training    loss ${last('loss')}  acc ${last('acc')}`,
  `  held out    loss ${last('val_loss')}  acc ${last('val_acc')} against the recorded labels, ` +
    `${heldOut.truth.toFixed(3)} against the true conditions`,
  '',
  'Phase level below 0 dB (diffusing) in every window since:',
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
const finalAdvice = mon.advice();
summary.push(
  '',
  `Phase detector: network ${phase.network}; ` +
    Object.entries(phase.layers)
      .map(([k, v]) => `${k} ${v}`)
      .join(', '),
  '',
  'Last probe values (bits), per layer:',
  probeHeader('layer'),
);
let marked = false;
for (const name of model.layers.map((l) => l.name)) {
  const p = lastProbe.get(name);
  if (p === undefined) {
    summary.push(`   ${name.padEnd(COLUMNS.layer)}not probed`);
    continue;
  }
  const r = probeRow(name, p.stats);
  marked ||= r.marked;
  summary.push(`${r.text}   step ${p.window.step}`);
}
if (marked) summary.push(SAT_LEGEND);
const noiseTaken = mon.windows().filter((w) => w.noise?.status === 'measured' || w.noise?.status === 'unresolved');
const measured = noiseTaken.length;
const resolved = noiseTaken.filter((w) => w.noise?.status === 'measured').length;
summary.push(
  `   probe ran in ${probeWindows} of ${windowsSeen} windows, on ${PROBE_ROWS} held-out measurements`,
  '',
  `Batch size: ${analysis.batchSizeAdvice(mon.windows().map(analysis.noiseReading), BATCH_SIZE, mon.windows().at(-1)?.step ?? null)}`,
  `   (noise measured in ${measured} of ${windowsSeen} windows, ${resolved} of them resolved, taking ${((mon.noiseCost()?.ms ?? 0) / 1000).toFixed(1)} s of training time)`,
  '',
  `Stored ${mon.windows().length} windows of run ${mon.runId} in ${outPath}`,
  outPath.endsWith('.jsonl')
    ? `Read it back with: npx tidemark summary ${args.out}`
    : `Read it back with: npx tidemark runs --db ${args.out}   and   npx tidemark show ${mon.runId.slice(0, 8)} --db ${args.out}`,
  '',
  ...(finalAdvice === null ? [] : [`Last advice: ${finalAdvice.verdict}. ${withCaution(finalAdvice.reason)}`]),
  'Caution: these numbers are statistical estimates from minibatches, not guarantees about the model;' +
    ' confirm any decision to stop training on held-out data.',
  `The information values are estimates too: binned ones move with the bin count (${PROBE_BINS} per unit here)` +
    ' and with the activation function, so a falling I(X;T) need not mean the layer discards input;' +
    ' ReLU networks need not show compression at all (Saxe et al. 2018). A compression marker is no reason' +
    ' on its own to stop or change training.',
);
console.log(summary.join('\n'));

// ---- serving on -------------------------------------------------------------------------------------

/** Closes the server, giving up after a few seconds so a stuck connection cannot hold the terminal. */
async function closeServer(running: RunningServer): Promise<void> {
  let timer: NodeJS.Timeout | undefined;
  const timeout = new Promise<void>((done) => {
    timer = setTimeout(done, 3000);
  });
  await Promise.race([running.close().catch((e: unknown) => console.error(`gearbox-demo: closing the server: ${String(e)}`)), timeout]);
  clearTimeout(timer);
}

if (server !== null) {
  if (!args.exit && !interrupted) {
    console.log(`\nTraining is over; still serving ${runLink} (the other stored runs are listed at ${server.url}/).`);
    console.log('Press Ctrl-C to stop the server; --exit ends the demo after training instead.');
    await new Promise<void>((done) => {
      onSignal = done;
    });
    onSignal = () => process.exit(130);
    console.log('\nStopping the server.');
  }
  await closeServer(server);
}
process.exitCode = interrupted ? 130 : 0;
