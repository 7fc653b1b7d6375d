/**
 * Where the noise measurement finds training rows: the `x` and `y` of the `fit` call in progress (an
 * instance-level wrapper of `model.fit`, installed by monitor() and removed by close(), the way the
 * optimizer tap is), or a sample the user passed as `noise: { x, y }` (for fitDataset and custom loops).
 * Only references are held, and fit's only while it runs: the user may dispose them afterwards.
 */
import * as tf from '@tensorflow/tfjs';
import { TidemarkTypeError } from '../errors.js';

/** Rows to draw groups from, without replacement. */
export interface RowSet {
  /** One tensor per model input, rows along the first axis. */
  xs: tf.Tensor[];
  /** One tensor per model output. */
  ys: tf.Tensor[];
  /** Rows that may be drawn: indices 0..count-1 (fit's validationSplit rows lie beyond). */
  count: number;
  /** The population the rows are: fit's whole training set (count), or null for a sample of unknown size. */
  population: number | null;
  source: 'fit' | 'option';
}

interface ModelLike {
  inputNames: string[];
  outputNames: string[];
  fit: (...args: unknown[]) => Promise<unknown>;
}

function asList(value: unknown, names: readonly string[], what: string): tf.Tensor[] | string {
  if (value instanceof tf.Tensor) return [value];
  if (Array.isArray(value) && value.every((t) => t instanceof tf.Tensor)) return value as tf.Tensor[];
  if (value !== null && typeof value === 'object') {
    const dict = value as Record<string, unknown>;
    const out: tf.Tensor[] = [];
    for (const n of names) {
      const t = dict[n];
      if (!(t instanceof tf.Tensor)) return `${what} has no tensor for '${n}'`;
      out.push(t);
    }
    return out;
  }
  return `${what} is not a tensor, an array of tensors or an object of tensors`;
}

function rowCount(list: tf.Tensor[]): number | null {
  const n = list[0]?.shape[0];
  if (n === undefined || !list.every((t) => t.shape[0] === n && !t.isDisposed)) return null;
  return n;
}

export class TrainingRows {
  private fitRows: RowSet | null = null;
  private readonly given: RowSet | null;
  /** Why fit's rows could not be used, for the record; null when they could or fit has not run. */
  private fitProblem: string | null = null;
  private readonly model: ModelLike;
  private restoreFit: (() => void) | null = null;
  /** True once a fit call was seen: between fits there are no rows, and that is no problem. */
  seenFit = false;

  constructor(model: unknown, given: { x: unknown; y: unknown } | null) {
    this.model = model as ModelLike;
    this.given = given === null ? null : this.copyGiven(given.x, given.y);
  }

  /** The rows to use now: the user's sample when given, else those of the fit in progress. */
  current(): RowSet | null {
    return this.given ?? this.fitRows;
  }

  /** Why there are no rows now, in a sentence. */
  missingReason(): string {
    if (this.fitProblem !== null) return this.fitProblem;
    return 'no training rows: pass noise: { x, y } (a sample of training rows) with fitDataset or a custom loop';
  }

  /** Wraps this model's fit so that its training rows are seen; idempotent; undone by {@link uninstall}. */
  install(): void {
    if (this.restoreFit !== null || typeof this.model.fit !== 'function') return;
    const model = this.model;
    const hadOwn = Object.prototype.hasOwnProperty.call(model, 'fit');
    const original = model.fit;
    const see = (args: unknown[]): void => this.seeFit(args[0], args[1], args[2]);
    const clear = (): void => {
      this.fitRows = null;
    };
    const wrapped = async function (this: unknown, ...args: unknown[]): Promise<unknown> {
      see(args);
      try {
        return await original.apply(this, args);
      } finally {
        clear();
      }
    };
    model.fit = wrapped;
    this.restoreFit = () => {
      // Someone wrapped fit after us: leave our wrapper in their chain; it only records references.
      if (model.fit !== wrapped) return;
      if (hadOwn) model.fit = original;
      else delete (model as Partial<ModelLike>).fit;
    };
  }

  uninstall(): void {
    this.restoreFit?.();
    this.restoreFit = null;
    this.fitRows = null;
  }

  dispose(): void {
    this.uninstall();
    if (this.given !== null) tf.dispose([...this.given.xs, ...this.given.ys]);
  }

  /** Never throws: fit must run exactly as without tidemark. */
  private seeFit(x: unknown, y: unknown, args: unknown): void {
    this.fitRows = null;
    this.fitProblem = null;
    this.seenFit = true;
    const xs = asList(x, this.model.inputNames ?? [], "fit's x");
    const ys = asList(y, this.model.outputNames ?? [], "fit's y");
    if (typeof xs === 'string' || typeof ys === 'string') {
      this.fitProblem = typeof xs === 'string' ? xs : (ys as string);
      return;
    }
    const n = rowCount([...xs, ...ys]);
    if (n === null) {
      this.fitProblem = "fit's x and y do not have the same number of rows";
      return;
    }
    const a = (args ?? {}) as { validationSplit?: unknown; validationData?: unknown; sampleWeight?: unknown; classWeight?: unknown };
    // fit trains on the first floor(N·(1 − split)) rows and validates on the rest (tfjs-layers training.ts).
    const split = a.validationData == null && typeof a.validationSplit === 'number' && a.validationSplit > 0 && a.validationSplit < 1 ? a.validationSplit : 0;
    const count = Math.floor(n * (1 - split));
    this.fitRows = { xs, ys, count, population: count, source: 'fit' };
  }

  private copyGiven(x: unknown, y: unknown): RowSet {
    const xs = asList(x, this.model.inputNames ?? [], 'noise.x');
    const ys = asList(y, this.model.outputNames ?? [], 'noise.y');
    if (typeof xs === 'string' || typeof ys === 'string') {
      throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `Option 'noise': ${typeof xs === 'string' ? xs : (ys as string)}; pass tensors with one row per example.`);
    }
    if (xs.length !== this.model.inputNames.length || ys.length !== this.model.outputNames.length) {
      throw new TidemarkTypeError(
        'TIDEMARK_ERR_OPTION_INVALID',
        `Option 'noise' needs one x tensor per model input (${this.model.inputNames.length}) and one y tensor per output (${this.model.outputNames.length}); received ${xs.length} and ${ys.length}.`,
      );
    }
    const n = rowCount([...xs, ...ys]);
    if (n === null) throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', "Option 'noise': x and y must have the same number of rows.");
    // A private copy: the user may dispose theirs.
    return { xs: xs.map((t) => tf.keep(t.clone())), ys: ys.map((t) => tf.keep(t.clone())), count: n, population: null, source: 'option' };
  }
}
