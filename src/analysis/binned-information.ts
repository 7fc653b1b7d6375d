/**
 * Plug-in binning estimates of a layer's information about its input and about the label
 * (methods.md §6.1). Each unit's activation is put in one of `bins` equal-width bins over the layer's
 * range and the whole binned row is one symbol T. For a deterministic network fed distinct probe inputs,
 * H(T|X) = 0, so I(X;T) = H(T); and I(T;Y) = H(T) − H(T|Y) with H(T|Y) = Σ_y p(y)·H(T|Y=y)
 * (Cover & Thomas, Elements of Information Theory, 2nd ed. 2006, Ch. 2). Entropies are in bits.
 *
 * What the numbers mean: the probe set is treated as uniform over its N rows, so 0 ≤ I(X;T) ≤ log2 N. When
 * every row lands in its own cell, H(T) = log2 N whatever the layer does: the value is then flagged
 * `saturated` and says nothing. The estimate depends on the bin count and the activation function; for a
 * continuous input the true I(X;T) of a deterministic net is infinite, so only the binned quantity is finite
 * (methods.md §6.1, Saxe et al. 2018).
 */

import { TidemarkRangeError, TidemarkTypeError } from '../errors.js';
import { unknownOption } from '../option-check.js';
import { countEntropy, millerMadowBits } from './entropy.js';

/** How close (in bits) H(T) must come to log2(rows) to be flagged `saturated`. */
export const SATURATION_MARGIN_BITS = 0.1;

export interface BinnedInformationOptions {
  /** Equal-width bins per unit, an integer ≥ 2. Default 30 (the usual choice in the literature, from memory). */
  bins?: number;
  /**
   * Fixed range [lo, hi] to bin over, e.g. [-1, 1] for tanh or [0, 1] for sigmoid; values outside it go in
   * the first or last bin. Default (null): the min..max of the layer's finite activations over all units.
   */
  range?: readonly [number, number] | null;
  /**
   * Add the Miller–Madow term (m̂ − 1)/(2N) nats to each entropy (Miller 1955; Paninski 2003). Default false.
   * The corrected values estimate the population's entropies, so they can exceed log2 N, and the
   * corrected I(T;Y) can fall slightly below 0 when T says nothing about Y. They are not clamped.
   */
  millerMadow?: boolean;
}

export interface BinnedInformation {
  /** I(X;T) = H(T), bits. NaN when no row is left. */
  mi_input: number;
  /** I(T;Y) = H(T) − H(T|Y), bits. NaN when no row is left. */
  mi_label: number;
  /** Plug-in H(T) within {@link SATURATION_MARGIN_BITS} of log2(rows): nearly every row has its own cell. */
  saturated: boolean;
  /** H(T), bits (corrected when `millerMadow`); equals `mi_input`. */
  h_t: number;
  /** H(T|Y) = Σ_y p(y)·H(T|Y=y), bits (each term corrected when `millerMadow`). */
  h_t_given_y: number;
  /** H(Y) of the labels of the rows used, plug-in, bits: the ceiling of the plug-in I(T;Y). */
  h_y: number;
  /** Distinct binned rows (occupied cells of T). */
  occupied: number;
  /** Rows used: the input rows minus the dropped ones. */
  rows: number;
  /** Rows left out because an activation was NaN or ±Infinity. */
  dropped: number;
  bins: number;
  /** The range binned over: the fixed one, or the data's min..max; [NaN, NaN] when no row is left. */
  range: [number, number];
  estimator: 'binned-plugin' | 'binned-miller-madow';
}

/** A layer's rows reduced to symbols: rows with the same binned pattern share a symbol. */
export interface BinnedSymbols {
  /** Symbol of each input row, 0..count-1 in order of first appearance; −1 for a dropped row. */
  symbol: Int32Array;
  /** Number of distinct symbols. */
  count: number;
  /** Rows dropped for a NaN or infinite activation. */
  dropped: number;
  /** The range binned over; [NaN, NaN] when every row was dropped. */
  range: [number, number];
}

const fail = (message: string): never => {
  throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', message);
};

const show = (v: unknown): string => (typeof v === 'string' ? JSON.stringify(v) : Array.isArray(v) ? `[${v.map(String).join(', ')}]` : String(v));

function isArrayLike(v: unknown): v is ArrayLike<number> {
  return (
    v != null &&
    (Array.isArray(v) || ArrayBuffer.isView(v) || (typeof v === 'object' && typeof (v as { length?: unknown }).length === 'number'))
  );
}

/** An integer option of an estimator, at least `min` when given (a seed takes any integer); throws TIDEMARK_ERR_OPTION_INVALID. */
export function checkInteger(where: string, name: string, v: number, min?: number): number {
  if (!Number.isInteger(v) || (min !== undefined && v < min)) {
    throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', `${where}: option '${name}' must be an integer${min === undefined ? '' : ` ≥ ${min}`}; received ${String(v)}.`);
  }
  return v;
}

/** Throws TIDEMARK_ERR_OPTION_UNKNOWN for an option name not in `known`, with the closest name as a hint. */
export function checkOptionNames(where: string, options: object, known: readonly string[]): void {
  for (const name of Object.keys(options)) if (!known.includes(name)) throw unknownOption(name, known, { owner: where });
}

/** The rows of the row-major `rows × cols` matrix whose values are all finite, in order. */
export function finiteRows(acts: ArrayLike<number>, rows: number, cols: number): number[] {
  const out: number[] = [];
  for (let r = 0; r < rows; r++) {
    let ok = true;
    for (let c = 0; c < cols && ok; c++) ok = Number.isFinite(acts[r * cols + c]);
    if (ok) out.push(r);
  }
  return out;
}

/** Compact class ids (0, 1, … in order of first appearance) of `labels[rows[i]]`, and each class's count. */
export function compactClasses(labels: ArrayLike<number>, rows: readonly number[]): { cls: Int32Array; sizes: number[] } {
  const classOf = new Map<number, number>();
  const cls = new Int32Array(rows.length);
  const sizes: number[] = [];
  rows.forEach((r, i) => {
    const y = labels[r] as number;
    let k = classOf.get(y);
    if (k === undefined) {
      k = sizes.length;
      classOf.set(y, k);
      sizes.push(0);
    }
    sizes[k] = (sizes[k] as number) + 1;
    cls[i] = k;
  });
  return { cls, sizes };
}

/**
 * Validates the (activations, shape, labels) triple the information estimators take: `acts` is row-major
 * rows×cols, `labels` one non-negative integer class index per row (pass `null` to skip the labels).
 * Returns [rows, cols].
 *
 * @throws TidemarkTypeError (`TIDEMARK_ERR_OPTION_INVALID`) when an argument is not array-like or the shape
 *   is not two integers; TidemarkRangeError (same code) when the lengths do not fit the shape or a label is
 *   not a non-negative integer.
 */
export function checkActivations(
  where: string,
  acts: unknown,
  shape: unknown,
  labels: unknown,
): [number, number] {
  if (!isArrayLike(acts)) {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `${where}: activations must be an array or typed array of numbers; received ${show(acts)}.`);
  }
  if (!Array.isArray(shape) || shape.length !== 2 || !Number.isInteger(shape[0]) || !Number.isInteger(shape[1])) {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `${where}: shape must be [rows, cols], two integers; received ${show(shape)}.`);
  }
  const rows = shape[0] as number;
  const cols = shape[1] as number;
  if (rows < 0 || cols < 1) fail(`${where}: shape must have rows ≥ 0 and cols ≥ 1; received [${rows}, ${cols}].`);
  if (acts.length !== rows * cols) {
    fail(`${where}: activations hold ${acts.length} values but shape [${rows}, ${cols}] needs ${rows * cols}; pass the layer output flattened row-major.`);
  }
  if (labels === null) return [rows, cols];
  if (!isArrayLike(labels)) {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `${where}: labels must be an array or typed array of class indices; received ${show(labels)}.`);
  }
  if (labels.length !== rows) {
    fail(`${where}: labels hold ${labels.length} values but the activations have ${rows} rows; pass one class index per row (see labelClasses for one-hot or regression targets).`);
  }
  for (let i = 0; i < rows; i++) {
    const y = labels[i];
    if (!Number.isInteger(y) || (y as number) < 0) {
      fail(`${where}: labels[${i}] is ${show(y)}; labels must be non-negative integer class indices (see labelClasses for one-hot or regression targets).`);
    }
  }
  return [rows, cols];
}

/** Checks `bins` (integer ≥ 2) and `range` ([lo, hi], finite, lo < hi, or null). */
export function checkBinning(where: string, bins: unknown, range: unknown): void {
  if (!Number.isInteger(bins) || (bins as number) < 2) {
    fail(`${where}: option 'bins' must be an integer ≥ 2; received ${show(bins)}.`);
  }
  if (range == null) return;
  if (!Array.isArray(range) || range.length !== 2 || !(Number.isFinite(range[0]) && Number.isFinite(range[1]) && range[0] < range[1])) {
    fail(`${where}: option 'range' must be [lo, hi] with finite lo < hi, or null for the data's range; received ${show(range)}.`);
  }
}

/**
 * The bins+1 edges of equal-width bins on [lo, hi], computed as lo + i·(hi−lo)/bins with the last edge
 * exactly hi (the same floating-point edges as NumPy's linspace, which methods.md §6.3's table used).
 */
export function binEdges(lo: number, hi: number, bins: number): Float64Array {
  const edges = new Float64Array(bins + 1);
  const w = (hi - lo) / bins;
  for (let i = 0; i < bins; i++) edges[i] = lo + i * w;
  edges[bins] = hi;
  return edges;
}

/**
 * The bin of `t` among `edges` (from {@link binEdges}): i with edge_i ≤ t < edge_{i+1}; the top edge goes in
 * the last bin and values outside the range in the end bins. The division guesses, the edges decide, so
 * points on an edge land as the edge array says.
 */
export function binOf(t: number, edges: Float64Array): number {
  const bins = edges.length - 1;
  const lo = edges[0] as number;
  const w = ((edges[bins] as number) - lo) / bins;
  if (!(w > 0)) return 0;
  let k = Math.floor((t - lo) / w);
  if (k < 0) k = 0;
  else if (k > bins - 1) k = bins - 1;
  while (k > 0 && t < (edges[k] as number)) k--;
  while (k < bins - 1 && t >= (edges[k + 1] as number)) k++;
  return k;
}

/**
 * Bin index of each value (NaN and ±Infinity get −1) over `range`, or the finite values' min..max.
 * For one scalar unit; {@link binnedSymbols} does whole rows.
 */
export function binIndices(values: ArrayLike<number>, options: { bins?: number; range?: readonly [number, number] | null } = {}): Int32Array {
  const bins = options.bins ?? 30;
  checkBinning('binIndices', bins, options.range);
  let lo = Number.POSITIVE_INFINITY;
  let hi = Number.NEGATIVE_INFINITY;
  if (options.range != null) [lo, hi] = options.range;
  else {
    for (let i = 0; i < values.length; i++) {
      const v = values[i] as number;
      if (!Number.isFinite(v)) continue;
      if (v < lo) lo = v;
      if (v > hi) hi = v;
    }
  }
  const edges = binEdges(lo, hi, bins);
  const out = new Int32Array(values.length);
  for (let i = 0; i < values.length; i++) {
    const v = values[i] as number;
    out[i] = Number.isFinite(v) ? binOf(v, edges) : -1;
  }
  return out;
}

/** murmur3's 32-bit finaliser: spreads every input bit over the output. */
function fmix32(h: number): number {
  h ^= h >>> 16;
  h = Math.imul(h, 0x85ebca6b);
  h ^= h >>> 13;
  h = Math.imul(h, 0xc2b2ae35);
  h ^= h >>> 16;
  return h >>> 0;
}

/**
 * Bins each unit of each row and gives every distinct binned row a symbol. Rows are hashed into a 53-bit
 * key (two independent 32-bit hashes) and, on a key hit, compared bin by bin with the row that holds the
 * key, so two different rows never share a symbol. Rows with a NaN or infinite activation are dropped
 * (symbol −1) and do not set the data range.
 */
export function binnedSymbols(
  acts: ArrayLike<number>,
  shape: readonly [number, number],
  options: { bins?: number; range?: readonly [number, number] | null } = {},
): BinnedSymbols {
  const [rows, cols] = checkActivations('binnedSymbols', acts, shape, null);
  const bins = options.bins ?? 30;
  checkBinning('binnedSymbols', bins, options.range);
  // One element type in the hot loops, whatever the caller passed (Float32Array from tfjs, arrays in tests).
  const data = acts instanceof Float64Array || acts instanceof Float32Array ? acts : Float64Array.from(acts);

  // Pass 1: drop rows with a non-finite value; find the data range if none is fixed.
  const symbol = new Int32Array(rows);
  let dropped = 0;
  let lo = Number.POSITIVE_INFINITY;
  let hi = Number.NEGATIVE_INFINITY;
  for (let r = 0; r < rows; r++) {
    const base = r * cols;
    let rlo = Number.POSITIVE_INFINITY;
    let rhi = Number.NEGATIVE_INFINITY;
    let finite = true;
    for (let c = 0; c < cols; c++) {
      const v = data[base + c] as number;
      // v − v is 0 for finite v and NaN for NaN or ±Infinity.
      if (v - v !== 0) {
        finite = false;
        break;
      }
      if (v < rlo) rlo = v;
      if (v > rhi) rhi = v;
    }
    if (!finite) {
      symbol[r] = -1;
      dropped++;
      continue;
    }
    if (rlo < lo) lo = rlo;
    if (rhi > hi) hi = rhi;
  }
  if (dropped === rows) return { symbol, count: 0, dropped, range: [Number.NaN, Number.NaN] };
  if (options.range != null) [lo, hi] = options.range;

  // Pass 2: bin, hash, and look each row up; equal keys are confirmed bin by bin.
  const edges = binEdges(lo, hi, bins);
  const last = bins - 1;
  const invW = hi > lo ? bins / (hi - lo) : 0;
  // Away from an edge the guess ⌊(v − lo)/w⌋ is the bin; within a few rounding errors of one (those of the
  // edges, ~ε·max|lo|,|hi| each, and of the product, ~ε·bins), the edges decide.
  const tol = 16 * Number.EPSILON * (bins + Math.max(Math.abs(lo), Math.abs(hi)) * invW);
  const binned = bins <= 256 ? new Uint8Array(rows * cols) : bins <= 65536 ? new Uint16Array(rows * cols) : new Int32Array(rows * cols);
  const firstOfKey = new Map<number, number>(); // key → first symbol with that key
  const nextWithKey: number[] = []; // symbol → next symbol with the same key, or −1
  const rowOf: number[] = []; // symbol → a row that has it
  let count = 0;
  for (let r = 0; r < rows; r++) {
    if (symbol[r] === -1) continue;
    const base = r * cols;
    let h1 = 0x811c9dc5;
    let h2 = 0x9747b28c;
    for (let c = 0; c < cols; c++) {
      // binOf inlined: the division guesses, the edges decide.
      const v = data[base + c] as number;
      let b = 0;
      if (invW > 0) {
        const x = (v - lo) * invW;
        b = Math.floor(x);
        const f = x - b;
        if (b <= 0 || b >= last || f < tol || f > 1 - tol) {
          if (b < 0) b = 0;
          else if (b > last) b = last;
          while (b > 0 && v < (edges[b] as number)) b--;
          while (b < last && v >= (edges[b + 1] as number)) b++;
        }
      }
      binned[base + c] = b;
      h1 = Math.imul(h1 ^ b, 0x01000193);
      h2 = Math.imul((h2 ^ b) + c, 0x5bd1e995);
      h2 ^= h2 >>> 15;
    }
    const key = fmix32(h1) * 2097152 + (fmix32(h2 ^ cols) >>> 11);
    let s = firstOfKey.get(key);
    let prev = -1;
    while (s !== undefined && s !== -1) {
      const other = (rowOf[s] as number) * cols;
      let same = true;
      for (let c = 0; c < cols; c++) {
        if (binned[other + c] !== binned[base + c]) {
          same = false;
          break;
        }
      }
      if (same) break;
      prev = s;
      s = nextWithKey[s];
    }
    if (s === undefined || s === -1) {
      s = count++;
      rowOf.push(r);
      nextWithKey.push(-1);
      if (prev === -1) firstOfKey.set(key, s);
      else nextWithKey[prev] = s;
    }
    symbol[r] = s;
  }
  return { symbol, count, dropped, range: [lo, hi] };
}

const OPTION_NAMES = ['bins', 'range', 'millerMadow'] as const;

/**
 * I(X;T) and I(T;Y) of one layer on a probe set, by plug-in binning (methods.md §6.1), in bits.
 *
 * @param acts the layer's activations, row-major `rows × cols` (one row per probe example).
 * @param shape `[rows, cols]`.
 * @param labels one class index (non-negative integer) per row; {@link labelClasses} makes them from
 *   one-hot, sparse or regression targets.
 *
 * Rows with a NaN or infinite activation are left out of every term and counted in `dropped`; the
 * estimates are then over the remaining rows (and NaN if none remain).
 *
 * @throws TidemarkTypeError / TidemarkRangeError (`TIDEMARK_ERR_OPTION_INVALID`) for a shape that does not
 *   fit, labels of another length or not class indices, `bins` < 2 or not an integer, a bad `range`;
 *   TidemarkTypeError (`TIDEMARK_ERR_OPTION_UNKNOWN`) for a misspelt option.
 */
export function binnedInformation(
  acts: ArrayLike<number>,
  shape: readonly [number, number],
  labels: ArrayLike<number>,
  options: BinnedInformationOptions = {},
): BinnedInformation {
  const where = 'binnedInformation';
  checkOptionNames(where, options, OPTION_NAMES);
  const [rows] = checkActivations(where, acts, shape, labels);
  const bins = options.bins ?? 30;
  checkBinning(where, bins, options.range);
  const mm = options.millerMadow ?? false;
  if (typeof mm !== 'boolean') {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `${where}: option 'millerMadow' must be true or false; received ${show(mm)}.`);
  }
  const estimator = mm ? 'binned-miller-madow' : 'binned-plugin';

  const { symbol, count, dropped, range } = binnedSymbols(acts, shape, { bins, range: options.range ?? null });
  const n = rows - dropped;
  if (n === 0) {
    const nan = Number.NaN;
    return { mi_input: nan, mi_label: nan, saturated: false, h_t: nan, h_t_given_y: nan, h_y: nan, occupied: 0, rows: 0, dropped, bins, range, estimator };
  }

  // Compact class ids, symbol counts, and joint (symbol, class) counts, over the rows that have a symbol.
  const kept: number[] = [];
  for (let r = 0; r < rows; r++) if ((symbol[r] as number) >= 0) kept.push(r);
  const { cls, sizes: classCount } = compactClasses(labels, kept);
  const nClasses = classCount.length;
  const symbolCount = new Float64Array(count);
  const joint = new Map<number, number>();
  kept.forEach((r, i) => {
    const s = symbol[r] as number;
    symbolCount[s] = (symbolCount[s] as number) + 1;
    const key = s * nClasses + (cls[i] as number);
    joint.set(key, (joint.get(key) ?? 0) + 1);
  });
  // H(T|Y=y) = log2 N_y − (1/N_y) Σ n log2 n over the cells of class y, gathered in one pass over the joint.
  const sumNlogN = new Float64Array(nClasses);
  const occupiedIn = new Float64Array(nClasses);
  for (const [key, c] of joint) {
    const k = key % nClasses;
    sumNlogN[k] = (sumNlogN[k] as number) + c * Math.log2(c);
    occupiedIn[k] = (occupiedIn[k] as number) + 1;
  }
  let hTgivenY = 0;
  for (let k = 0; k < nClasses; k++) {
    const ny = classCount[k] as number;
    let hy = Math.max(0, Math.log2(ny) - (sumNlogN[k] as number) / ny);
    if (mm) hy += millerMadowBits(occupiedIn[k] as number, ny);
    hTgivenY += (ny / n) * hy;
  }

  const hT = countEntropy(symbolCount);
  const hTplugin = hT.bits;
  const hTout = mm ? hTplugin + millerMadowBits(hT.occupied, n) : hTplugin;
  const hY = countEntropy(classCount).bits;
  return {
    mi_input: hTout,
    // The plug-in difference is ≥ 0 in exact arithmetic; clamp its rounding residue. The corrected one is left as is.
    mi_label: mm ? hTout - hTgivenY : Math.max(0, hTout - hTgivenY),
    saturated: hTplugin >= Math.log2(n) - SATURATION_MARGIN_BITS,
    h_t: hTout,
    h_t_given_y: hTgivenY,
    h_y: hY,
    occupied: count,
    rows: n,
    dropped,
    bins,
    range,
    estimator,
  };
}

export interface BinnedMutualInformation {
  /** I(X;Y) = H(X) + H(Y) − H(X,Y), bits. */
  mi: number;
  h_x: number;
  h_y: number;
  h_xy: number;
  /** Pairs used (both finite). */
  n: number;
}

/**
 * I(X;Y) of two scalar samples from their joint histogram: each variable in `bins` equal-width bins over
 * its own range (or the given one), I = H(X) + H(Y) − H(X,Y) in bits, plug-in or Miller–Madow corrected.
 * Pairs with a non-finite member are left out.
 *
 * Bias: binning merges values, so on the true distribution the binned MI is at most the continuous MI
 * (data processing inequality, Cover & Thomas Ch. 2): with few bins the estimate is low. On a finite
 * sample the plug-in MI is biased up by about (Bx−1)(By−1)/(2N ln 2) bits (Miller 1955; Paninski 2003),
 * so with many bins for the sample size it is high.
 */
export function binnedMutualInformation(
  x: ArrayLike<number>,
  y: ArrayLike<number>,
  options: { bins?: number; rangeX?: readonly [number, number] | null; rangeY?: readonly [number, number] | null; millerMadow?: boolean } = {},
): BinnedMutualInformation {
  const where = 'binnedMutualInformation';
  checkOptionNames(where, options, ['bins', 'rangeX', 'rangeY', 'millerMadow']);
  if (!isArrayLike(x) || !isArrayLike(y)) {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `${where}: x and y must be arrays or typed arrays of numbers.`);
  }
  if (x.length !== y.length) fail(`${where}: x has ${x.length} values but y has ${y.length}; pass one y per x.`);
  const bins = options.bins ?? 30;
  checkBinning(where, bins, options.rangeX);
  checkBinning(where, bins, options.rangeY);
  const keep: number[] = [];
  for (let i = 0; i < x.length; i++) if (Number.isFinite(x[i]) && Number.isFinite(y[i])) keep.push(i);
  const xs = Float64Array.from(keep, (i) => x[i] as number);
  const ys = Float64Array.from(keep, (i) => y[i] as number);
  const bx = binIndices(xs, { bins, range: options.rangeX ?? null });
  const by = binIndices(ys, { bins, range: options.rangeY ?? null });
  const cx = new Float64Array(bins);
  const cy = new Float64Array(bins);
  const cxy = new Float64Array(bins * bins);
  for (let i = 0; i < keep.length; i++) {
    const a = bx[i] as number;
    const b = by[i] as number;
    cx[a] = (cx[a] as number) + 1;
    cy[b] = (cy[b] as number) + 1;
    cxy[a * bins + b] = (cxy[a * bins + b] as number) + 1;
  }
  const ex = countEntropy(cx);
  const ey = countEntropy(cy);
  const exy = countEntropy(cxy);
  const n = keep.length;
  const mm = options.millerMadow === true;
  const hx = ex.bits + (mm ? millerMadowBits(ex.occupied, n) : 0);
  const hy = ey.bits + (mm ? millerMadowBits(ey.occupied, n) : 0);
  const hxy = exy.bits + (mm ? millerMadowBits(exy.occupied, n) : 0);
  return { mi: hx + hy - hxy, h_x: hx, h_y: hy, h_xy: hxy, n };
}
