/**
 * Class indices for the information estimators from the probe's targets: one-hot (or soft) rows by
 * argmax, sparse class indices as they are, and regression targets cut into equal-count (quantile) bins.
 */

import { TidemarkRangeError, TidemarkTypeError } from '../errors.js';
import { checkOptionNames } from './binned-information.js';

export type LabelKind = 'onehot' | 'sparse' | 'regression';

export interface LabelClassOptions {
  /**
   * How to read the targets. Default 'auto': more than one column → 'onehot'; one column of non-negative
   * integers → 'sparse'; anything else → 'regression'. Integer-valued regression targets (counts, ratings)
   * read as classes under 'auto': pass 'regression' for them.
   */
  kind?: 'auto' | LabelKind;
  /** Quantile bins for regression targets, an integer ≥ 2. Default 10 (common practice, no source). */
  bins?: number;
}

export interface LabelClasses {
  /** Class index per row, 0-based. */
  classes: Int32Array;
  /** Number of classes: the columns for one-hot, max + 1 for sparse, the bins for regression. */
  count: number;
  /** How the targets were read. */
  kind: LabelKind;
}

const fail = (message: string): never => {
  throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', message);
};

/** Row-wise argmax of a row-major rows×cols matrix; ties go to the first column; NaN never wins unless the row is all NaN (then 0). */
export function oneHotToClasses(values: ArrayLike<number>, rows: number, cols: number): Int32Array {
  const out = new Int32Array(rows);
  for (let r = 0; r < rows; r++) {
    let best = 0;
    let bestV = Number.NEGATIVE_INFINITY;
    for (let c = 0; c < cols; c++) {
      const v = values[r * cols + c] as number;
      if (v > bestV) {
        bestV = v;
        best = c;
      }
    }
    out[r] = best;
  }
  return out;
}

/**
 * Equal-count bins of a scalar target: rows sorted by value, the tie group spanning sorted positions
 * [a, b) goes to bin ⌊((a + b − 1)/2)·bins/n⌋ (its middle position), so equal values always share a bin and
 * the counts are equal up to ties (and up to n mod bins). Returns a bin index per row, 0..bins−1.
 *
 * @throws TidemarkRangeError (`TIDEMARK_ERR_OPTION_INVALID`) for a NaN or infinite target or bins < 2.
 */
export function quantileBins(values: ArrayLike<number>, bins: number): Int32Array {
  if (!Number.isInteger(bins) || bins < 2) fail(`quantileBins: bins must be an integer ≥ 2; received ${String(bins)}.`);
  const n = values.length;
  for (let i = 0; i < n; i++) {
    if (!Number.isFinite(values[i])) fail(`quantileBins: values[${i}] is ${String(values[i])}; regression targets must be finite.`);
  }
  const order = Array.from({ length: n }, (_, i) => i).sort((a, b) => (values[a] as number) - (values[b] as number) || a - b);
  const out = new Int32Array(n);
  let a = 0;
  while (a < n) {
    const v = values[order[a] as number] as number;
    let b = a + 1;
    while (b < n && values[order[b] as number] === v) b++;
    const bin = Math.min(bins - 1, Math.floor((((a + b - 1) / 2) * bins) / n));
    for (let k = a; k < b; k++) out[order[k] as number] = bin;
    a = b;
  }
  return out;
}

/**
 * Class indices of the probe targets `values` (row-major `rows × cols`), for {@link binnedInformation} and
 * {@link pairwiseInformationBounds}.
 *
 * @throws TidemarkTypeError / TidemarkRangeError (`TIDEMARK_ERR_OPTION_INVALID`) when the shape does not fit,
 *   'sparse' targets are not non-negative integers, regression targets have more than one column or a
 *   non-finite value, or `bins` < 2; TidemarkTypeError (`TIDEMARK_ERR_OPTION_UNKNOWN`) for a misspelt option.
 */
export function labelClasses(
  values: ArrayLike<number>,
  shape: readonly [number, number],
  options: LabelClassOptions = {},
): LabelClasses {
  const where = 'labelClasses';
  checkOptionNames(where, options, ['kind', 'bins']);
  if (!Array.isArray(shape) || shape.length !== 2 || !Number.isInteger(shape[0]) || !Number.isInteger(shape[1]) || shape[0] < 0 || shape[1] < 1) {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `${where}: shape must be [rows, cols] with rows ≥ 0 and cols ≥ 1; received ${String(shape)}.`);
  }
  const [rows, cols] = shape;
  if (values == null || typeof values.length !== 'number') {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `${where}: targets must be an array or typed array of numbers.`);
  }
  if (values.length !== rows * cols) fail(`${where}: targets hold ${values.length} values but shape [${rows}, ${cols}] needs ${rows * cols}.`);
  const bins = options.bins ?? 10;
  if (!Number.isInteger(bins) || bins < 2) fail(`${where}: option 'bins' must be an integer ≥ 2; received ${String(bins)}.`);
  let kind = options.kind ?? 'auto';
  if (!['auto', 'onehot', 'sparse', 'regression'].includes(kind)) {
    fail(`${where}: option 'kind' must be 'auto', 'onehot', 'sparse' or 'regression'; received ${String(kind)}.`);
  }
  if (kind === 'auto') {
    if (cols > 1) kind = 'onehot';
    else {
      let integers = true;
      for (let i = 0; i < rows && integers; i++) integers = Number.isInteger(values[i]) && (values[i] as number) >= 0;
      kind = integers ? 'sparse' : 'regression';
    }
  }
  if (kind === 'onehot') return { classes: oneHotToClasses(values, rows, cols), count: cols, kind };
  if (cols !== 1) fail(`${where}: ${kind} targets need one column; received ${cols} columns.`);
  if (kind === 'sparse') {
    const classes = new Int32Array(rows);
    let max = -1;
    for (let i = 0; i < rows; i++) {
      const y = values[i] as number;
      if (!Number.isInteger(y) || y < 0) fail(`${where}: targets[${i}] is ${String(y)}; sparse labels must be non-negative integers.`);
      classes[i] = y;
      if (y > max) max = y;
    }
    return { classes, count: max + 1, kind };
  }
  return { classes: quantileBins(values, bins), count: bins, kind: 'regression' };
}
