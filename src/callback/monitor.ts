/**
 * monitor(): attaches to a compiled tf.LayersModel, taps its optimizer, and turns each window of
 * minibatch gradients into a WindowRecord. Everything that can fail during training is caught and
 * reported (unless `strict`), because monitoring must never break the run it watches.
 */
import { randomUUID } from 'node:crypto';
import * as tf from '@tensorflow/tfjs';
import { snrFloor } from '../analysis/gradient-stats.js';
import { travelExponent } from '../analysis/travel-exponent.js';
import { PhaseDetector } from '../analysis/phase-detector.js';
import { adviceChanged, StopAdvisor, zeroGradients, type Advice } from '../analysis/stop-advice.js';
import { CompressionDetector, type CompressionEvent } from '../analysis/compression-detector.js';
import { codeOf, describeCause, TidemarkError, type ErrorCode, type MonitorWarning } from '../errors.js';
import { closestName } from '../option-check.js';
import type {
  LayerStats,
  Marker,
  Phase,
  RunInfo,
  SinkRecord,
  VariableStats,
  WindowRecord,
} from '../protocol/records.js';
import { JsonlSink } from '../storage/jsonl-sink.js';
import { MemorySink } from '../storage/memory-sink.js';
import type { Sink } from '../storage/sink.js';
import { connectStore } from '../storage/connect-store.js';
import { parseSinkAddress } from '../storage/sink-address.js';
import { RemoteSink } from '../storage/remote-sink.js';
import { StoreSink } from '../storage/store-sink.js';
import type { RunningServer } from '../server/serve.js';
import type { Accumulator, RawVariableWindow } from './accumulator.js';
import { JsAccumulator } from './js-accumulator.js';
import { layerInfo, viewModel, type ModelView } from './model-layers.js';
import { NoiseMeter, type NoiseResult } from './noise-meter.js';
import { installTap, type GradientPair } from './optimizer-tap.js';
import { resolveOptions, type MonitorOptions, type ResolvedOptions } from './options.js';
import { Probe, probeFailure, type ProbeResult } from './probe.js';
import { TensorAccumulator } from './tensor-accumulator.js';
import { pooledStats, variableStats, type WindowContext } from './window-stats.js';
import { MIN_WINDOW, WindowSchedule } from './window-schedule.js';

/** Backends whose tensor memory JavaScript reads without stalling a device. */
const HOST_MEMORY_BACKENDS = new Set(['cpu', 'wasm', 'tensorflow']);
/** Window records kept in memory for windows(); older ones stay in the sink only. */
export const MAX_WINDOWS_IN_MEMORY = 10_000;
/** Windows of travel history kept per layer for the exponent fit. */
const TRAVEL_HISTORY = 512;

export interface PhaseState {
  network: Phase;
  layers: Record<string, Phase>;
  /** Estimated step at which each layer's current phase began; null while undetermined. */
  since: Record<string, number | null>;
  networkSince: number | null;
}

/** The plain callback object fit and fitDataset accept. */
export interface MonitorCallback {
  onTrainBegin(logs?: Record<string, unknown>): Promise<void>;
  onTrainEnd(logs?: Record<string, unknown>): Promise<void>;
  onEpochBegin(epoch: number, logs?: Record<string, unknown>): Promise<void>;
  onEpochEnd(epoch: number, logs?: Record<string, unknown>): Promise<void>;
  onBatchEnd(batch: number, logs?: Record<string, unknown>): Promise<void>;
}

export interface Monitor {
  /** The run's UUID. */
  readonly runId: string;
  /** The run's name. */
  readonly name: string;
  /** Which accumulator the monitor chose ('js' or 'tensor'). */
  readonly accumulator: 'js' | 'tensor';
  /** Pass in `callbacks` of fit or fitDataset. */
  readonly callback: MonitorCallback;
  /** Calls `fn` with each window as it closes. Returns a function that unsubscribes. */
  onWindow(fn: (window: WindowRecord) => void): () => void;
  /** The windows so far (the most recent 10000). */
  windows(): readonly WindowRecord[];
  /** The current phase of the network and of each layer. */
  phase(): PhaseState;
  /** The latest stop advice (a statistical estimate; confirm on held-out data), or null before the first window. */
  advice(): Advice | null;
  markers(): readonly Marker[];
  /** Problems the monitor absorbed, once per kind. */
  warnings(): readonly MonitorWarning[];
  /** Writes what is buffered to the store. */
  flush(): Promise<void>;
  /** With `serve`: the URL the run is served at (http://127.0.0.1:PORT), until close(); otherwise null. */
  readonly url: string | null;
  /** With `probe`: how many probes ran during training and the time they took (ms); otherwise null. */
  probeCost(): { calls: number; ms: number } | null;
  /** How many noise measurements ran and the time they took (ms); null with `noise: false`. */
  noiseCost(): { calls: number; ms: number } | null;
  /** Closes the last partial window (when it has ≥ 2 minibatches), restores the optimizer, closes the store. */
  close(): Promise<void>;
}

function openSink(store: string | Sink, onError: (e: unknown) => void): Sink {
  if (typeof store !== 'string') return store;
  const at = parseSinkAddress(store);
  switch (at.kind) {
    case 'memory':
      return new MemorySink();
    case 'server': {
      const token = process.env.TIDEMARK_TOKEN;
      return new RemoteSink({ url: at.url, ...(token !== undefined && token !== '' && !/[?&]token=/.test(at.url) ? { token } : {}), onError });
    }
    case 'jsonl':
      return new JsonlSink(at.path, { onError });
    case 'postgres':
      return new StoreSink(() => connectStore(at.url), { onError });
    case 'sqlite':
      return new StoreSink(() => connectStore(at.path), { onError });
  }
}

function chooseAccumulator(kind: ResolvedOptions['accumulator'], view: ModelView): Accumulator {
  const useJs = kind === 'js' || (kind === 'auto' && HOST_MEMORY_BACKENDS.has(tf.getBackend()));
  return useJs ? new JsAccumulator(view) : new TensorAccumulator(view);
}

interface LogSum {
  sum: number;
  n: number;
}

class MonitorSession implements Monitor {
  readonly runId: string;
  readonly name: string;
  readonly callback: MonitorCallback;
  private readonly opts: ResolvedOptions;
  private readonly view: ModelView;
  private readonly acc: Accumulator;
  private readonly schedule: WindowSchedule;
  private readonly removeTap: () => void;
  private sink: Sink | null;
  private readonly listeners = new Set<(w: WindowRecord) => void>();
  private readonly windowList: WindowRecord[] = [];
  private readonly markerList: Marker[] = [];
  private readonly warningList: MonitorWarning[] = [];
  private readonly warningCounts = new Map<ErrorCode, number>();
  private readonly travel = new Map<string, { steps: number[]; travels: number[] }>();
  private readonly lastNonfinite = new Map<string, number>();
  private chain: Promise<void> = Promise.resolve();
  private closed = false;
  private inFit = false;
  private step = 0;
  private windowIndex = 0;
  private windowFirstStep = 1;
  private epoch = 0;
  private batchesThisEpoch = 0;
  private batchesPerEpoch: number | null = null;
  private logSums = new Map<string, LogSum>();
  private sizeSum = 0;
  private sizeCount = 0;
  private epochLogs: Record<string, number> = {};
  private sampleThisStep = false;
  private readonly detector: PhaseDetector;
  private readonly advisor: StopAdvisor;
  private watchChecked = false;
  private lastAdvice: Advice | null = null;
  private readonly model: { stopTraining: boolean };
  private readonly probe: Probe | null;
  private readonly meter: NoiseMeter | null;
  private served: RunningServer | null = null;
  private readonly compression = new CompressionDetector();
  /** performance.now() at the first step: the probe's time budget is a share of the time since. */
  private trainingStart: number | null = null;
  /** Minibatches of the open window per epoch touched. */
  private passBatches: number[] = [];
  private passOpen = false;

  constructor(
    opts: ResolvedOptions,
    view: ModelView,
    runId: string,
    model: { stopTraining: boolean },
    probe: Probe | null,
    meter: NoiseMeter | null,
  ) {
    this.opts = opts;
    this.model = model;
    this.probe = probe;
    this.meter = meter;
    meter?.rows.install();
    this.detector = new PhaseDetector(opts.phases);
    const { act: _act, ...policy } = opts.advice;
    this.advisor = new StopAdvisor(policy);
    this.view = view;
    this.runId = runId;
    this.name = opts.run;
    this.acc = chooseAccumulator(opts.accumulator, view);
    this.schedule = new WindowSchedule(opts.window);
    // A sink's own coded reports (a lost server, a refused batch) keep their code.
    this.sink = openSink(opts.store, (e) => this.report(codeOf(e) ?? 'TIDEMARK_ERR_SINK_WRITE', e));
    this.removeTap = installTap(view.optimizer, {
      before: (grads) => this.tapBefore(grads),
      after: () => this.tapAfter(),
      onError: (e) => this.fail('TIDEMARK_ERR_STATISTIC', e),
    });
    this.callback = {
      onTrainBegin: async () => {
        if (this.closed) return;
        this.inFit = true;
        // A new fit after the advice said stop is a decision to train on: the patience starts over.
        this.advisor.restart();
      },
      onTrainEnd: async () => {
        if (this.closed) return;
        if (this.acc.pending >= MIN_WINDOW) await this.closeWindow();
        this.inFit = false;
      },
      onEpochBegin: async () => {
        if (this.closed) return;
        this.batchesThisEpoch = 0;
        this.passOpen = false;
      },
      onEpochEnd: async (_epoch, logs) => {
        if (this.closed) return;
        try {
          if (this.batchesPerEpoch === null && this.batchesThisEpoch > 0) this.batchesPerEpoch = this.batchesThisEpoch;
          for (const [k, v] of Object.entries(logs ?? {})) {
            if (k.startsWith('val_') && typeof v === 'number') this.epochLogs[k] = v;
          }
          this.checkWatched(logs);
          const close = this.schedule.closeAtEpochEnd(this.acc.pending, this.batchesPerEpoch);
          if (close) await this.closeWindow();
        } catch (e) {
          this.fail('TIDEMARK_ERR_STATISTIC', e);
        } finally {
          this.epoch++;
        }
      },
      onBatchEnd: async (_batch, logs) => {
        if (this.closed) return;
        try {
          this.batchesThisEpoch++;
          this.countPassBatch();
          for (const [k, v] of Object.entries(logs ?? {})) {
            if (typeof v !== 'number' || k === 'batch') continue;
            if (k === 'size') {
              this.sizeSum += v;
              this.sizeCount++;
              continue;
            }
            const s = this.logSums.get(k);
            if (s === undefined) this.logSums.set(k, { sum: v, n: 1 });
            else {
              s.sum += v;
              s.n++;
            }
          }
          if (this.schedule.closeAfterStep(this.acc.pending, this.batchesPerEpoch, true)) await this.closeWindow();
        } catch (e) {
          this.fail('TIDEMARK_ERR_STATISTIC', e);
        }
      },
    };
  }

  probeCost(): { calls: number; ms: number } | null {
    return this.probe === null ? null : { ...this.probe.cost };
  }

  noiseCost(): { calls: number; ms: number } | null {
    return this.meter === null ? null : { ...this.meter.cost };
  }

  get url(): string | null {
    return this.served?.url ?? null;
  }

  /** Serves the store in-process; a port in use degrades to a warning (unless strict). */
  async serve(port: number): Promise<void> {
    try {
      // Loaded here, not at import: a monitor that serves nothing never loads the server's dependencies.
      const { startServer } = await import('../server/serve.js');
      this.served = await startServer({ db: this.opts.store as string, port, host: '127.0.0.1', onError: (e) => this.report('TIDEMARK_ERR_INTERNAL', e) });
      console.info(`tidemark: run '${this.name}' is served at ${this.served.url} until mon.close()`);
    } catch (e) {
      this.fail(codeOf(e) ?? 'TIDEMARK_ERR_SERVE_LISTEN', e, 'Training goes on; the run is stored, and `tidemark serve` can show it.');
    }
  }

  get accumulator(): 'js' | 'tensor' {
    return this.acc.kind;
  }

  async start(run: RunInfo): Promise<void> {
    const sink = this.sink;
    if (sink === null) return;
    try {
      await sink.open(run);
    } catch (e) {
      this.sink = null;
      this.fail('TIDEMARK_ERR_SINK_OPEN', e, 'Records stay in memory only (mon.windows()).');
      return;
    }
    this.write({ type: 'run', run });
  }

  private tapBefore(grads: readonly GradientPair[]): void {
    if (this.closed) return;
    this.trainingStart ??= performance.now();
    this.step++;
    this.sampleThisStep = this.acc.pending === 0;
    this.acc.before(grads, this.sampleThisStep);
  }

  private tapAfter(): void {
    if (this.closed) return;
    this.acc.after(this.sampleThisStep);
    if (!this.inFit && this.schedule.closeAfterStep(this.acc.pending, null, false)) {
      // No fit hooks in a custom loop: close here; the read-back, if any, finishes in the background.
      this.closeWindow().catch(() => {});
    }
  }

  /** Said once: gradients that are all exactly zero mean units or the whole network no longer learn. */
  private checkGradientsAlive(record: WindowRecord): void {
    const zero = zeroGradients(record);
    if (!zero.network && zero.layers.length === 0) return;
    const what = zero.network
      ? 'every gradient of the network was exactly zero: it no longer learns (every unit dead, or a learning rate that broke it)'
      : `every gradient of ${zero.layers.length === 1 ? `layer ${zero.layers[0]}` : `layers ${zero.layers.join(', ')}`} was exactly zero: ${zero.layers.length === 1 ? 'it no longer learns' : 'they no longer learn'} (dead units)`;
    this.report('TIDEMARK_ERR_GRADIENTS_ZERO', `In the window ending at step ${record.step}, ${what}.`, 'Phases cannot be told there; lower the learning rate or start again from new weights.');
  }

  /** Once, at the first epoch end: a watched quantity that fit does not log is said at once, not discovered later. */
  private checkWatched(logs: Record<string, unknown> | undefined): void {
    const watch = this.opts.advice.watch;
    if (this.watchChecked || watch === undefined || logs === undefined) return;
    this.watchChecked = true;
    if (watch in logs) return;
    const names = Object.keys(logs).filter((k) => typeof logs[k] === 'number').sort();
    const best = closestName(watch, names);
    this.report(
      'TIDEMARK_ERR_ADVICE_WATCH',
      `advice.watch is '${watch}', but the first epoch logged ${names.length > 0 ? names.join(', ') : 'nothing'}${best !== null ? ` (did you mean '${best}'?)` : ''}.`,
      'The stop advice will say continue until that quantity appears.',
    );
  }

  private countPassBatch(): void {
    if (!this.passOpen || this.passBatches.length === 0) {
      this.passBatches.push(0);
      this.passOpen = true;
    }
    this.passBatches[this.passBatches.length - 1]!++;
  }

  private takeLogs(): Record<string, number> {
    const logs: Record<string, number> = {};
    for (const [k, s] of this.logSums) logs[k] = s.sum / s.n;
    Object.assign(logs, this.epochLogs);
    this.logSums = new Map();
    this.epochLogs = {};
    return logs;
  }

  /**
   * Runs a noise measurement when one is due, synchronously, so the weights cannot move under it (in a
   * custom loop the window closes inside the optimizer call). Never throws unless strict.
   */
  private measureNoise(index: number, batchSize: number | null): NoiseResult | null {
    const meter = this.meter;
    if (meter === null) return null;
    const trainingMs = this.trainingStart === null ? 0 : performance.now() - this.trainingStart;
    if (!meter.due(index, trainingMs)) return null;
    // Between two fit calls (a window left for close()) there are no rows to draw, by design.
    if (meter.rows.current() === null && meter.rows.seenFit && !this.inFit) return null;
    try {
      const result = meter.measure(batchSize, meter.allowance(trainingMs));
      const s = result.sample;
      if (s.status === 'unavailable' || s.status === 'failed') this.report('TIDEMARK_ERR_NOISE', `No noise measurement: ${s.reason ?? s.status}. noise_scale stays null.`);
      return result;
    } catch (e) {
      this.fail('TIDEMARK_ERR_NOISE', e, 'noise_scale stays null in this window.');
      return null;
    }
  }

  private closeWindow(): Promise<void> {
    const batches = this.acc.pending;
    const batchSize = this.sizeCount > 0 ? this.sizeSum / this.sizeCount : this.opts.batchSize;
    const noise = this.measureNoise(this.windowIndex, batchSize);
    const meta = {
      index: this.windowIndex++,
      first_step: this.windowFirstStep,
      step: this.step,
      epoch: this.inFit ? this.epoch : null,
      batches,
      batch_size: batchSize,
      batches_per_epoch: this.inFit ? this.batchesPerEpoch : null,
      pass_batches: this.passBatches,
      ...(noise === null ? {} : { noise: noise.sample }),
      logs: this.takeLogs(),
    };
    this.passBatches = [];
    this.passOpen = false;
    this.sizeSum = 0;
    this.sizeCount = 0;
    this.windowFirstStep = this.step + 1;
    this.schedule.closed();
    let raw: Promise<RawVariableWindow[]>;
    try {
      raw = this.acc.close();
    } catch (e) {
      raw = Promise.reject(e);
    }
    const done = this.chain.then(async () => {
      const values = await raw;
      const trainingMs = this.trainingStart === null ? 0 : performance.now() - this.trainingStart;
      const probed = this.probe !== null && this.probe.due(meta.index, trainingMs) ? await this.runProbe() : null;
      this.finishWindow(values, meta, probed, noise);
    });
    // The chain itself never rejects, so one failed window does not block the next.
    this.chain = done.catch((e) => {
      if (!this.opts.strict) this.report('TIDEMARK_ERR_STATISTIC', e);
    });
    return this.opts.strict ? done.catch((e) => this.fail('TIDEMARK_ERR_STATISTIC', e)) : this.chain;
  }

  private finishWindow(
    raw: RawVariableWindow[],
    meta: Omit<WindowRecord, 'run' | 'snr_floor' | 'time' | 'layers' | 'network'>,
    probed: ProbeResult | null,
    noise: NoiseResult | null,
  ): void {
    const ctx: WindowContext = {
      batchSize: meta.batch_size,
      batchesPerEpoch: meta.batches_per_epoch,
      passBatches: meta.pass_batches,
      noise: noise?.grams ?? null,
      maxError: this.meter?.options.maxError ?? 0,
    };
    const layers: Record<string, LayerStats> = {};
    const all: { raw: RawVariableWindow; params: number; index: number }[] = [];
    for (const layer of this.view.layers) {
      const parts = layer.variables.map((v) => ({ raw: raw[v.index]!, params: v.size, index: v.index }));
      all.push(...parts);
      const variables: Record<string, VariableStats> = {};
      for (const v of layer.variables) variables[v.name] = variableStats(raw[v.index]!, v.size, v.index, ctx);
      const stats = pooledStats(parts, ctx);
      layers[layer.name] = {
        ...stats,
        travel_exponent: this.exponent(layer.name, meta.step, stats.weight_travel),
        ...probed?.layers[layer.name],
        variables,
      };
      this.noteNonfinite(layer.name, stats.nonfinite, meta.first_step, meta.step);
    }
    const net = pooledStats(all, ctx);
    const network: LayerStats = { ...net, travel_exponent: this.exponent('', meta.step, net.weight_travel) };
    const record: WindowRecord = {
      run: this.runId,
      ...meta,
      snr_floor: snrFloor(meta.batches, meta.batches_per_epoch, meta.pass_batches),
      time: Date.now(),
      layers,
      network,
    };
    this.windowList.push(record);
    if (this.windowList.length > MAX_WINDOWS_IN_MEMORY) this.windowList.shift();
    this.write({ type: 'window', window: record });
    this.judge(record);
    if (probed !== null) this.watchCompression(record.step, probed);
    for (const fn of this.listeners) {
      try {
        fn(record);
      } catch (e) {
        this.fail('TIDEMARK_ERR_LISTENER', e);
      }
    }
    const sink = this.sink;
    if (sink !== null) sink.flush().catch((e) => this.report('TIDEMARK_ERR_SINK_WRITE', e));
  }

  /** Phase changes become markers as they are found; the advice is a marker when its verdict or stage changes. */
  private judge(record: WindowRecord): void {
    for (const c of this.detector.update(record)) this.addMarker({ run: this.runId, ...c, details: { ...c.details, source: 'online' } });
    this.checkGradientsAlive(record);
    const advice = this.advisor.update(record, this.detector.snapshot());
    const previous = this.lastAdvice;
    this.lastAdvice = advice;
    if (adviceChanged(previous, advice)) {
      this.addMarker({
        run: this.runId,
        layer: null,
        kind: 'advice',
        step: record.step,
        detected_step: record.step,
        confidence: 1,
        details: { verdict: advice.verdict, stage: advice.stage, reason: advice.reason, watched: advice.watched, best: advice.best, source: 'online' },
      });
    }
    if (advice.verdict === 'stop' && this.opts.advice.act && this.inFit && !this.model.stopTraining) {
      // fit checks stopTraining after each batch; this window's epoch end still runs.
      this.model.stopTraining = true;
      this.addMarker({
        run: this.runId,
        layer: null,
        kind: 'stopped',
        step: record.step,
        detected_step: record.step,
        confidence: 1,
        details: { reason: advice.reason, by: 'advice.act' },
      });
    }
  }

  /** Runs the probe between windows; a failure leaves the window without probe values, never breaks fit. */
  private async runProbe(): Promise<ProbeResult | null> {
    try {
      const result = await (this.probe as Probe).measure();
      const dropped = Object.entries(result.dropped);
      if (dropped.length > 0) {
        this.report(
          'TIDEMARK_ERR_PROBE',
          `NaN or infinite activations on the probe set (${dropped.map(([l, n]) => `${l}: ${n} rows`).join(', ')}); those rows are left out of the layer's estimates (see probe_rows).`,
        );
      }
      return result;
    } catch (e) {
      this.fail('TIDEMARK_ERR_PROBE', probeFailure(e));
      return null;
    }
  }

  /**
   * A sustained fall of a layer's I(X;T) becomes a compression-start marker: the noise-regularised
   * (pairwise, upper) estimate when the probe computes it, which stays informative on wide layers where the
   * binned one sits at log2(rows) and can neither fall nor rise; a saturated point is skipped.
   */
  private watchCompression(step: number, probed: ProbeResult): void {
    const o = (this.probe as Probe).options;
    const pairwise = o.boundRows > 0;
    const values: Record<string, number | null> = {};
    for (const [layer, v] of Object.entries(probed.layers)) {
      values[layer] = pairwise ? (v.mi_bounds_saturated === 1 ? null : (v.mi_input_upper ?? null)) : v.mi_input;
    }
    const settings = pairwise
      ? { estimator: 'pairwise-kolchinsky-tracey', ...(o.noiseVariance === null ? { noise_ratio: o.noiseRatio } : { noise_variance: o.noiseVariance }) }
      : { estimator: 'binned-plugin', bins: o.bins };
    for (const e of this.compression.push(step, values) as CompressionEvent[]) {
      this.addMarker({
        run: this.runId,
        layer: e.layer,
        kind: 'compression-start',
        step: e.step,
        detected_step: e.detected_step,
        confidence: e.confidence,
        details: { ...e.details, ...settings, source: 'online' },
      });
    }
  }

  private exponent(key: string, step: number, travel: number): number | null {
    let h = this.travel.get(key);
    if (h === undefined) {
      h = { steps: [], travels: [] };
      this.travel.set(key, h);
    }
    h.steps.push(step);
    h.travels.push(travel);
    if (h.steps.length > TRAVEL_HISTORY) {
      h.steps.shift();
      h.travels.shift();
    }
    return travelExponent(h.steps, h.travels);
  }

  private noteNonfinite(layer: string, count: number, firstStep: number, step: number): void {
    const before = this.lastNonfinite.get(layer) ?? 0;
    this.lastNonfinite.set(layer, count);
    if (count === 0 || before > 0) return;
    this.addMarker({
      run: this.runId,
      layer,
      kind: 'nonfinite',
      step: firstStep,
      detected_step: step,
      confidence: 1,
      details: { count, message: 'NaN or infinite gradient values; the affected minibatches were left out of the statistics' },
    });
    this.report(
      'TIDEMARK_ERR_NONFINITE',
      `layer ${layer}: ${count} non-finite gradient values in steps ${firstStep}–${step}; those minibatches were left out of the statistics.`,
    );
  }

  private addMarker(marker: Marker): void {
    this.markerList.push(marker);
    this.write({ type: 'marker', marker });
  }

  private write(record: SinkRecord): void {
    const sink = this.sink;
    if (sink === null) return;
    try {
      sink.write(record);
    } catch (e) {
      this.report('TIDEMARK_ERR_SINK_WRITE', e);
    }
  }

  /** A problem during training: thrown in strict mode, otherwise reported once per kind. */
  private fail(code: ErrorCode, error: unknown, advice = ''): void {
    if (this.opts.strict) {
      if (error instanceof TidemarkError) throw error;
      throw new TidemarkError(code, `${describeCause(error)}${advice ? ` ${advice}` : ''}`, { cause: error });
    }
    this.report(code, error, advice);
  }

  private report(code: ErrorCode, error: unknown, advice = ''): void {
    const count = this.warningCounts.get(code) ?? 0;
    this.warningCounts.set(code, count + 1);
    if (count > 0) return;
    const message = `${typeof error === 'string' ? error : describeCause(error)}${advice ? ` ${advice}` : ''}`;
    const warning: MonitorWarning = { code, message, step: this.step, cause: error };
    this.warningList.push(warning);
    this.write({ type: 'warning', run: this.runId, code, message, step: this.step, time: Date.now() });
    try {
      if (this.opts.onWarning) this.opts.onWarning(warning);
      else console.warn(`tidemark [${code}]: ${message}`);
    } catch {
      // A throwing warning handler must not reach fit either.
    }
  }

  onWindow(fn: (window: WindowRecord) => void): () => void {
    if (typeof fn !== 'function') throw new TypeError('onWindow(fn) needs a function');
    this.listeners.add(fn);
    return () => {
      this.listeners.delete(fn);
    };
  }

  windows(): readonly WindowRecord[] {
    return this.windowList.slice();
  }

  phase(): PhaseState {
    const snap = this.detector.snapshot();
    const layers: Record<string, Phase> = {};
    const since: Record<string, number | null> = {};
    for (const l of this.view.layers) {
      layers[l.name] = snap.layers[l.name] ?? 'undetermined';
      since[l.name] = snap.since[l.name] ?? null;
    }
    return { network: snap.network, layers, since, networkSince: snap.networkSince };
  }

  advice(): Advice | null {
    return this.lastAdvice;
  }

  markers(): readonly Marker[] {
    return this.markerList.slice();
  }

  warnings(): readonly MonitorWarning[] {
    return this.warningList.slice();
  }

  async flush(): Promise<void> {
    await this.chain;
    if (this.sink !== null) await this.sink.flush();
  }

  async close(): Promise<void> {
    if (this.closed) return;
    this.removeTap();
    if (this.acc.pending >= MIN_WINDOW) await this.closeWindow().catch(() => {});
    await this.chain;
    this.closed = true;
    // fit never reached onTrainEnd: it threw.
    const status = this.inFit ? 'failed' : 'finished';
    this.write({ type: 'end', run: this.runId, status, step: this.step, time: Date.now() });
    this.acc.dispose();
    this.probe?.dispose();
    this.meter?.dispose();
    const served = this.served;
    this.served = null;
    const sink = this.sink;
    this.sink = null;
    if (sink !== null) {
      try {
        await sink.close();
      } catch (e) {
        this.report('TIDEMARK_ERR_SINK_WRITE', e);
      }
      if (sink.dropped > 0) {
        // Reported even when an earlier write failure was: the count is what the user needs.
        this.warningCounts.delete('TIDEMARK_ERR_SINK_WRITE');
        this.report(
          'TIDEMARK_ERR_SINK_WRITE',
          `${sink.dropped} records could not be stored and were dropped (the store kept refusing writes); mon.windows() still has the most recent windows.`,
        );
      }
    }
    if (served !== null) await served.close().catch((e: unknown) => this.report('TIDEMARK_ERR_INTERNAL', e));
  }
}

/**
 * Starts monitoring a compiled model. Pass `mon.callback` to fit or fitDataset; custom loops that
 * call `minimize` or `applyGradients` on the model's optimizer are seen too.
 */
export async function monitor(model: tf.LayersModel, options: MonitorOptions = {}): Promise<Monitor> {
  const opts = resolveOptions(options);
  const view = viewModel(model);
  const runId = randomUUID();
  // Built before anything starts, so a probe that does not fit the model is an error here, not in fit.
  const probe = opts.probe === null ? null : new Probe(model, view, opts.probe);
  if (probe !== null && opts.probe?.every === 'auto') {
    try {
      await probe.warmUp();
    } catch (e) {
      probe.dispose();
      throw e;
    }
  }
  let meter: NoiseMeter | null = null;
  try {
    meter = opts.noise === null ? null : new NoiseMeter(model, view, opts.noise);
  } catch (e) {
    probe?.dispose();
    throw e;
  }
  const session = new MonitorSession(opts, view, runId, model as unknown as { stopTraining: boolean }, probe, meter);
  const run: RunInfo = {
    id: runId,
    name: opts.run,
    group: opts.group,
    tags: { ...opts.tags },
    started_at: Date.now(),
    config: {
      window: opts.window,
      batch_size: opts.batchSize,
      accumulator: session.accumulator,
      backend: tf.getBackend(),
      probe: probe?.describe() ?? null,
      noise: opts.noise === null ? null : { ...opts.noise, rows: opts.noise.rows === null ? 'fit' : 'option' },
    },
    layers: layerInfo(view),
  };
  try {
    await session.start(run);
    if (opts.serve !== null) await session.serve(opts.serve);
  } catch (e) {
    await session.close();
    throw e;
  }
  return session;
}
