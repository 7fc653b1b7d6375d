/**
 * monitor() options: one defaults table, validated and frozen before training starts. Unknown or
 * misspelt names throw with a hint, so a typo never silently turns a feature off.
 */
import { checkOptions, unknownOption } from '../option-check.js';
import { TidemarkRangeError, TidemarkTypeError, type MonitorWarning } from '../errors.js';
import { ADVICE_RULES, type AdviceOptions } from '../analysis/stop-advice.js';
import { PHASE_RULES, type PhaseOptions } from '../analysis/phase-detector.js';
import type { Sink } from '../storage/sink.js';
import { parseSinkAddress } from '../storage/sink-address.js';
import { resolveNoiseOptions, type NoiseOptions, type ResolvedNoiseOptions } from './noise-meter.js';
import { resolveProbeOptions, type ProbeOptions, type ResolvedProbeOptions } from './probe.js';

export type WindowSetting = 'auto' | 'epoch' | number;
export type AccumulatorKind = 'auto' | 'js' | 'tensor';

export interface MonitorOptions {
  /** Run name. Default: `run-` and the start time. Each run also gets a UUID. */
  run?: string;
  /**
   * Where records go: a SQLite file (default `$TIDEMARK_DB` or `tidemark.db` in the working directory),
   * a path ending in `.jsonl` (JSON Lines, appended), `'memory'` (kept in the monitor only), a running
   * `tidemark serve` (its `http://host:port` address as printed, or `ws://host:port`), or a {@link Sink}.
   * Other URLs are refused.
   */
  store?: string | Sink;
  /**
   * Window of minibatches per record. `'auto'` (default): 8 steps, growing ×1.25 a window up to one
   * epoch, then one epoch. `'epoch'`: one window per epoch. A number N ≥ 2: every N steps.
   */
  window?: WindowSetting;
  /** Examples per minibatch, for the noise scale in custom loops. Default: read from fit's batch logs. */
  batchSize?: number;
  /**
   * How gradients are accumulated. `'auto'` (default): float64 JavaScript arrays on the cpu, wasm and
   * tensorflow backends, tensor ops elsewhere (webgl, webgpu), where reading each gradient back would stall.
   */
  accumulator?: AccumulatorKind;
  /** Group name, for comparing runs. Default none. */
  group?: string;
  /** Free string tags. Default none. */
  tags?: Record<string, string>;
  /** Throw monitoring errors into fit instead of degrading. Default false. */
  strict?: boolean;
  /** Told about each absorbed problem. Default: one console warning per kind of problem. */
  onWarning?: (warning: MonitorWarning) => void;
  /**
   * Stop advice. `act: true` lets a `stop` verdict end fit (model.stopTraining); default false, the
   * advice is only reported. The other fields tune the policy (see the README for the defaults).
   */
  advice?: AdviceOptions & { act?: boolean };
  /** Settings of the drift/diffusion detector (see the README for the defaults). */
  phases?: PhaseOptions;
  /**
   * Activation probe: per-layer activation health and information estimates on a fixed probe set
   * `{ x, y }`, every `every` windows (default 5). Default: off. See {@link ProbeOptions}.
   */
  probe?: ProbeOptions;
  /**
   * Noise measurements: the fixed-weight gradient noise scale from gradients of disjoint groups of
   * training rows at the current weights, within `budget` (default 1 %) of the training time. On by
   * default, with fit's own x and y; pass `{ x, y }` for fitDataset or custom loops; `false` turns it off.
   * See {@link NoiseOptions}.
   */
  noise?: NoiseOptions | false;
  /**
   * Serve this run live on 127.0.0.1 at this port (0: any free port), in-process, until `close()`:
   * the API, the live stream and /metrics (`mon.url`). Needs a SQLite store. Default: off.
   */
  serve?: number | false;
}

export interface ResolvedOptions {
  readonly run: string;
  readonly store: string | Sink;
  readonly window: WindowSetting;
  readonly batchSize: number | null;
  readonly accumulator: AccumulatorKind;
  readonly group: string | null;
  readonly tags: Readonly<Record<string, string>>;
  readonly strict: boolean;
  readonly onWarning: ((warning: MonitorWarning) => void) | null;
  readonly advice: Readonly<AdviceOptions & { act: boolean }>;
  readonly phases: Readonly<PhaseOptions>;
  readonly probe: ResolvedProbeOptions | null;
  readonly noise: ResolvedNoiseOptions | null;
  readonly serve: number | null;
}

const KNOWN = [
  'run',
  'store',
  'window',
  'batchSize',
  'accumulator',
  'group',
  'tags',
  'strict',
  'onWarning',
  'advice',
  'phases',
  'probe',
  'noise',
  'serve',
] as const;

/** In design.md's contract, built in later versions. */


/** `$TIDEMARK_DB`, else `tidemark.db` in the working directory. */
export function defaultStore(): string {
  const env = process.env.TIDEMARK_DB;
  return env !== undefined && env !== '' ? env : 'tidemark.db';
}

function invalid(name: string, expected: string, got: unknown): TidemarkTypeError {
  const shown = typeof got === 'string' ? `'${got}'` : typeof got === 'function' ? 'a function' : JSON.stringify(got);
  return new TidemarkTypeError(
    'TIDEMARK_ERR_OPTION_INVALID',
    `Option '${name}' must be ${expected}; received ${shown}.`,
  );
}

function isSink(value: unknown): value is Sink {
  if (value === null || typeof value !== 'object') return false;
  const s = value as Record<string, unknown>;
  return ['open', 'write', 'flush', 'close'].every((m) => typeof s[m] === 'function');
}

/** Copies, validates and freezes the options. Throws a coded TypeError or RangeError. */
export function resolveOptions(input: unknown, now: () => number = Date.now): ResolvedOptions {
  if (input === undefined || input === null) input = {};
  if (typeof input !== 'object' || Array.isArray(input)) throw invalid('options', 'an object', input);
  const o = input as Record<string, unknown>;
  for (const key of Object.keys(o)) {
    if (!(KNOWN as readonly string[]).includes(key)) throw unknownOption(key, KNOWN);
  }

  const run = o.run ?? `run-${new Date(now()).toISOString()}`;
  if (typeof run !== 'string' || run.length === 0 || run.length > 10_000) {
    throw invalid('run', 'a non-empty string of at most 10000 characters', o.run);
  }

  const store = o.store ?? defaultStore();
  if (typeof store === 'string') {
    parseSinkAddress(store);
  } else if (!isSink(store)) {
    throw invalid('store', "a file path (SQLite, or .jsonl for JSON Lines), 'memory', or a Sink object", store);
  }

  const window = o.window ?? 'auto';
  if (typeof window === 'number') {
    if (!Number.isInteger(window) || window < 2 || window > 1_000_000) {
      throw new TidemarkRangeError(
        'TIDEMARK_ERR_OPTION_INVALID',
        `Option 'window' as a number of steps must be an integer from 2 to 1000000; received ${window}. ` +
          'A window needs at least two minibatches for a spread.',
      );
    }
  } else if (window !== 'auto' && window !== 'epoch') {
    throw invalid('window', "'auto', 'epoch' or an integer number of steps ≥ 2", window);
  }

  let batchSize: number | null = null;
  if (o.batchSize !== undefined) {
    if (typeof o.batchSize !== 'number' || !Number.isInteger(o.batchSize) || o.batchSize < 1) {
      throw invalid('batchSize', 'a positive integer', o.batchSize);
    }
    batchSize = o.batchSize;
  }

  const accumulator = o.accumulator ?? 'auto';
  if (accumulator !== 'auto' && accumulator !== 'js' && accumulator !== 'tensor') {
    throw invalid('accumulator', "'auto', 'js' or 'tensor'", accumulator);
  }

  let group: string | null = null;
  if (o.group !== undefined) {
    if (typeof o.group !== 'string' || o.group.length === 0) throw invalid('group', 'a non-empty string', o.group);
    group = o.group;
  }

  const tags: Record<string, string> = {};
  if (o.tags !== undefined) {
    if (o.tags === null || typeof o.tags !== 'object' || Array.isArray(o.tags)) {
      throw invalid('tags', 'an object of string values', o.tags);
    }
    for (const [k, v] of Object.entries(o.tags as Record<string, unknown>)) {
      if (typeof v !== 'string') throw invalid(`tags.${k}`, 'a string', v);
      tags[k] = v;
    }
  }

  const strict = o.strict ?? false;
  if (typeof strict !== 'boolean') throw invalid('strict', 'true or false', strict);

  const onWarning = o.onWarning ?? null;
  if (onWarning !== null && typeof onWarning !== 'function') throw invalid('onWarning', 'a function', onWarning);

  const advice = checkOptions<AdviceOptions & { act: boolean }>(o.advice, { act: { type: 'boolean' }, ...ADVICE_RULES }, { act: false }, { prefix: 'advice.' });
  const phases = checkOptions<PhaseOptions>(o.phases, PHASE_RULES, {}, { prefix: 'phases.' });
  const probe = resolveProbeOptions(o.probe);
  const noise = resolveNoiseOptions(o.noise);

  let serve: number | null = null;
  if (o.serve !== undefined && o.serve !== false) {
    if (typeof o.serve !== 'number' || !Number.isInteger(o.serve) || o.serve < 0 || o.serve > 65535) {
      throw invalid('serve', 'a port number from 0 to 65535 (0: any free port), or false', o.serve);
    }
    const kind = typeof store === 'string' ? parseSinkAddress(store).kind : null;
    if (kind !== 'sqlite' && kind !== 'postgres') {
      throw new TidemarkTypeError(
        'TIDEMARK_ERR_OPTION_INVALID',
        `Option 'serve' serves the run from its store (a SQLite file or a postgres:// database), but 'store' is ${typeof store === 'string' ? `'${store}'` : 'a Sink object'}. Use a SQLite file (the default), or run 'tidemark serve' and send to it with store: 'ws://127.0.0.1:7341'.`,
      );
    }
    serve = o.serve;
  }

  return Object.freeze({
    advice: advice as ResolvedOptions['advice'],
    phases,
    probe,
    noise,
    serve,
    run,
    store: store as string | Sink,
    window: window as WindowSetting,
    batchSize,
    accumulator: accumulator as AccumulatorKind,
    group,
    tags: Object.freeze(tags),
    strict,
    onWarning: onWarning as ResolvedOptions['onWarning'],
  });
}
