/**
 * A lower bound on a layer's I(T;Y) from a linear classifier fitted to its activations: the variational bound
 * of D. Barber & F. Agakov (2003, "The IM algorithm: a variational approach to Information Maximization",
 * NIPS 16), I(T;Y) ≥ H(Y) + E[log q(y|t)] for any conditional q, here with q a softmax regression on the
 * layer's units (a "linear classifier probe", G. Alain & Y. Bengio 2016, arXiv:1610.01644). methods.md §6.4.
 *
 * Unlike the noise-regularised estimate it needs no noise level and cannot saturate: it measures the label
 * information a linear read-out can take from the layer as it is. For the last hidden layer of a classifier
 * the network's own head is such a read-out, so a network that predicts well cannot show a low value there.
 * It is a lower bound: information a linear map cannot reach (an earlier layer whose classes are not linearly
 * separable yet) is not counted, and the data processing inequality need not hold between layers.
 *
 * The bound holds for the expectation under the data's distribution. E[log q] is estimated on rows the
 * classifier did not see (k-fold cross-fitting: each fold is scored by a classifier fitted on the others),
 * so over-fitting lowers the value instead of inflating it. H(Y) is the plug-in entropy of the rows' labels.
 * A value below 0 says nothing (I ≥ 0 anyway) and is reported as 0.
 */

import { TidemarkRangeError } from '../errors.js';
import { checkActivations, checkInteger, checkOptionNames, compactClasses, finiteRows } from './binned-information.js';
import { LN2 } from './entropy.js';
import { mulberry32, subsample } from './random.js';

export interface LinearProbeOptions {
  /** Folds of the cross-fitting, an integer ≥ 2. Default 2. */
  folds?: number;
  /**
   * Weight of the ridge penalty (l2/2)·‖W‖² on the standardised units' weights (the objective is the mean
   * log-loss per row), ≥ 0. Default 1/n for n fitting rows: a N(0, 1) prior on each weight of a standardised
   * unit, which keeps the fit finite when the classes are separable (common practice, no source).
   */
  l2?: number;
  /**
   * Iterations of L-BFGS per fit, an integer ≥ 1; it stops sooner once an iteration gains less than 1e-5 nats.
   * Default 20: on MNIST layers the bound moved by less than 0.03 bit between 15 and 30 iterations, at half the cost.
   */
  maxIterations?: number;
  /** At most this many rows are used; more are subsampled with a seeded generator. Default 1024. */
  maxRows?: number;
  /** Seed of the subsample and of the fold assignment. Default 0. */
  seed?: number;
}

export interface LinearProbeInformation {
  /** max(0, H(Y) − cross_entropy): a lower bound on I(T;Y), bits. */
  mi_label_lower: number;
  /** Held-out cross-entropy of the linear read-out, bits per row. */
  cross_entropy: number;
  /** Plug-in entropy of the labels of the rows used, bits. */
  label_entropy: number;
  /** Held-out accuracy of the linear read-out. */
  accuracy: number;
  /** Rows used; rows with a NaN or infinite activation are dropped first (`dropped`). */
  rows: number;
  dropped: number;
  classes: number;
  estimator: 'linear-probe-barber-agakov';
}

export const LINEAR_PROBE_DEFAULTS = Object.freeze({ folds: 2, maxIterations: 20, maxRows: 1024, seed: 0 });

const OPTION_NAMES = ['folds', 'l2', 'maxIterations', 'maxRows', 'seed'] as const;

/** Floor of a unit's spread in the standardisation, as a share of the layer's root-mean-square unit spread. */
const SCALE_FLOOR = 0.1;
/** Share of the read-out's distribution given to the uniform one (costs at most −ln(1 − ε) ≈ 0.001 nats a row). */
const UNIFORM_SHARE = 1e-3;

/** A softmax regression's data: standardised features (row-major n × d), class indices, class count. */
interface FitData {
  x: Float64Array;
  y: Int32Array;
  n: number;
  d: number;
  k: number;
}

/**
 * (1/n)·Σ −ln softmax(W·x + b)[y] + (l2/2)·‖W‖², and its gradient into `grad`. Parameters: W class by class
 * (k rows of d, so each logit is one contiguous dot product) then b (k).
 */
function objective(p: Float64Array, grad: Float64Array, data: FitData, l2: number): number {
  const { x, y, n, d, k } = data;
  grad.fill(0);
  const z = new Float64Array(k);
  let loss = 0;
  const bOff = d * k;
  for (let i = 0; i < n; i++) {
    const row = i * d;
    let max = -Infinity;
    for (let c = 0; c < k; c++) {
      const v = (p[bOff + c] as number) + rowDot(x, row, p, c * d, d);
      z[c] = v;
      if (v > max) max = v;
    }
    let sum = 0;
    for (let c = 0; c < k; c++) {
      const e = Math.exp((z[c] as number) - max);
      z[c] = e;
      sum += e;
    }
    const yi = y[i] as number;
    loss += Math.log(sum) - Math.log(z[yi] as number);
    // softmax − onehot: the gradient of the row's loss with respect to its logits.
    for (let c = 0; c < k; c++) {
      const g = (z[c] as number) / sum - (c === yi ? 1 : 0);
      if (g === 0) continue;
      rowAxpy(grad, c * d, g, x, row, d);
      grad[bOff + c] = (grad[bOff + c] as number) + g;
    }
  }
  let reg = 0;
  for (let t = 0; t < p.length; t++) grad[t] = (grad[t] as number) / n;
  for (let t = 0; t < bOff; t++) {
    const w = p[t] as number;
    reg += w * w;
    grad[t] = (grad[t] as number) + l2 * w;
  }
  return loss / n + (l2 / 2) * reg;
}

/** Σ_j a[ai + j]·b[bi + j] over d terms, four at a time (the inner loop of every fit). */
function rowDot(a: Float64Array, ai: number, b: Float64Array, bi: number, d: number): number {
  let s0 = 0;
  let s1 = 0;
  let s2 = 0;
  let s3 = 0;
  let j = 0;
  for (; j + 3 < d; j += 4) {
    s0 += (a[ai + j] as number) * (b[bi + j] as number);
    s1 += (a[ai + j + 1] as number) * (b[bi + j + 1] as number);
    s2 += (a[ai + j + 2] as number) * (b[bi + j + 2] as number);
    s3 += (a[ai + j + 3] as number) * (b[bi + j + 3] as number);
  }
  for (; j < d; j++) s0 += (a[ai + j] as number) * (b[bi + j] as number);
  return s0 + s1 + s2 + s3;
}

/** out[oi + j] += g·x[xi + j] over d terms. */
function rowAxpy(out: Float64Array, oi: number, g: number, x: Float64Array, xi: number, d: number): void {
  for (let j = 0; j < d; j++) out[oi + j] = (out[oi + j] as number) + g * (x[xi + j] as number);
}

function dot(a: Float64Array, b: Float64Array): number {
  let s = 0;
  for (let i = 0; i < a.length; i++) s += (a[i] as number) * (b[i] as number);
  return s;
}

/**
 * Minimises the objective by L-BFGS (memory 8) with a backtracking line search on the Armijo condition
 * (Nocedal & Wright 2006, Numerical Optimization, Alg. 7.4 for the two-loop recursion, Alg. 3.1 for the
 * backtracking; from memory). The objective is convex, so any descent that converges finds its minimum.
 */
function fitSoftmax(data: FitData, l2: number, maxIterations: number, init: Float64Array): Float64Array {
  const m = 8;
  const size = init.length;
  const p = init.slice();
  const g = new Float64Array(size);
  let f = objective(p, g, data, l2);
  const ss: Float64Array[] = [];
  const ys: Float64Array[] = [];
  const rho: number[] = [];
  const alpha = new Array<number>(m).fill(0);
  const trial = new Float64Array(size);
  const gTrial = new Float64Array(size);
  for (let it = 0; it < maxIterations; it++) {
    const gNorm = Math.sqrt(dot(g, g));
    if (!(gNorm > 1e-6)) break;
    // Two-loop recursion: dir = −H·g.
    const q = g.slice();
    for (let i = ss.length - 1; i >= 0; i--) {
      alpha[i] = (rho[i] as number) * dot(ss[i]!, q);
      const yi = ys[i]!;
      for (let t = 0; t < size; t++) q[t] = (q[t] as number) - (alpha[i] as number) * (yi[t] as number);
    }
    const last = ss.length - 1;
    const gamma = last >= 0 ? dot(ss[last]!, ys[last]!) / dot(ys[last]!, ys[last]!) : 1 / gNorm;
    for (let t = 0; t < size; t++) q[t] = (q[t] as number) * gamma;
    for (let i = 0; i < ss.length; i++) {
      const beta = (rho[i] as number) * dot(ys[i]!, q);
      const si = ss[i]!;
      for (let t = 0; t < size; t++) q[t] = (q[t] as number) + ((alpha[i] as number) - beta) * (si[t] as number);
    }
    let slope = -dot(g, q);
    if (!(slope < 0)) {
      // Not a descent direction (numerical trouble): restart from the steepest descent.
      ss.length = 0;
      ys.length = 0;
      rho.length = 0;
      for (let t = 0; t < size; t++) q[t] = (g[t] as number) / gNorm;
      slope = -gNorm;
    }
    let step = 1;
    let fTrial = Infinity;
    for (let back = 0; back < 30; back++) {
      for (let t = 0; t < size; t++) trial[t] = (p[t] as number) - step * (q[t] as number);
      fTrial = objective(trial, gTrial, data, l2);
      if (fTrial <= f + 1e-4 * step * slope) break;
      step /= 2;
    }
    if (!(fTrial < f)) break;
    const s = new Float64Array(size);
    const yv = new Float64Array(size);
    for (let t = 0; t < size; t++) {
      s[t] = (trial[t] as number) - (p[t] as number);
      yv[t] = (gTrial[t] as number) - (g[t] as number);
    }
    const sy = dot(s, yv);
    if (sy > 1e-12) {
      ss.push(s);
      ys.push(yv);
      rho.push(1 / sy);
      if (ss.length > m) {
        ss.shift();
        ys.shift();
        rho.shift();
      }
    }
    // The bound is read to a few thousandths of a bit; a gain below 1e-5 nats per iteration changes nothing there.
    const converged = f - fTrial <= 1e-5;
    p.set(trial);
    g.set(gTrial);
    f = fTrial;
    if (converged) break;
  }
  return p;
}

/**
 * The Barber–Agakov lower bound on I(T;Y) of the layer whose activations are the row-major `acts`
 * (`shape` = [rows, units]), with `labels` the class of each row, from a cross-fitted softmax regression.
 *
 * @throws TidemarkTypeError / TidemarkRangeError (`TIDEMARK_ERR_OPTION_INVALID`) for a shape that does not fit,
 *   labels of another length or not class indices, an option out of range;
 *   TidemarkTypeError (`TIDEMARK_ERR_OPTION_UNKNOWN`) for a misspelt option.
 */
export function linearProbeInformation(
  acts: ArrayLike<number>,
  shape: readonly [number, number],
  labels: ArrayLike<number>,
  options: LinearProbeOptions = {},
): LinearProbeInformation {
  const where = 'linearProbeInformation';
  checkOptionNames(where, options, OPTION_NAMES);
  const [rows, cols] = checkActivations(where, acts, shape, labels);
  // An option given as undefined counts as not given (as in option-check.ts).
  const o = {
    folds: options.folds ?? LINEAR_PROBE_DEFAULTS.folds,
    l2: options.l2 ?? null,
    maxIterations: options.maxIterations ?? LINEAR_PROBE_DEFAULTS.maxIterations,
    maxRows: options.maxRows ?? LINEAR_PROBE_DEFAULTS.maxRows,
    seed: options.seed ?? LINEAR_PROBE_DEFAULTS.seed,
  };
  const folds = checkInteger(where, 'folds', o.folds, 2);
  const maxIterations = checkInteger(where, 'maxIterations', o.maxIterations, 1);
  const maxRows = checkInteger(where, 'maxRows', o.maxRows, 1);
  checkInteger(where, 'seed', o.seed);
  if (o.l2 !== null && (!(o.l2 >= 0) || !Number.isFinite(o.l2))) {
    throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', `${where}: option 'l2' must be a finite number ≥ 0; received ${String(o.l2)}.`);
  }

  let used = finiteRows(acts, rows, cols);
  const dropped = rows - used.length;
  if (used.length > maxRows) used = subsample(used, maxRows, o.seed);
  const n = used.length;
  const { cls: y, sizes: counts } = compactClasses(labels, used);
  const k = counts.length;
  const base = { rows: n, dropped, classes: k, estimator: 'linear-probe-barber-agakov' as const };
  if (n === 0) return { mi_label_lower: Number.NaN, cross_entropy: Number.NaN, label_entropy: Number.NaN, accuracy: Number.NaN, ...base };
  let hy = 0;
  for (const c of counts) hy -= (c / n) * Math.log(c / n);
  if (k < 2) return { mi_label_lower: 0, cross_entropy: 0, label_entropy: 0, accuracy: 1, ...base };

  // Folds dealt class by class in a seeded order, so every fold holds every class in proportion.
  const rng = mulberry32(o.seed + 1);
  const fold = new Int32Array(n);
  let dealt = 0;
  for (let c = 0; c < k; c++) {
    const members: number[] = [];
    for (let i = 0; i < n; i++) if (y[i] === c) members.push(i);
    for (let i = members.length - 1; i > 0; i--) {
      const j = Math.floor(rng() * (i + 1));
      [members[i], members[j]] = [members[j]!, members[i]!];
    }
    for (const i of members) fold[i] = dealt++ % folds;
  }

  let nats = 0;
  let correct = 0;
  let scored = 0;
  for (let f = 0; f < folds; f++) {
    const train: number[] = [];
    const test: number[] = [];
    for (let i = 0; i < n; i++) (fold[i] === f ? test : train).push(i);
    if (test.length === 0 || train.length === 0) continue;
    // Standardise on the training rows; a constant unit carries nothing and is left at 0.
    const mean = new Float64Array(cols);
    const scale = new Float64Array(cols);
    for (const i of train) for (let c = 0; c < cols; c++) mean[c] = (mean[c] as number) + (acts[used[i]! * cols + c] as number);
    for (let c = 0; c < cols; c++) mean[c] = (mean[c] as number) / train.length;
    for (const i of train) {
      for (let c = 0; c < cols; c++) {
        const dv = (acts[used[i]! * cols + c] as number) - (mean[c] as number);
        scale[c] = (scale[c] as number) + dv * dv;
      }
    }
    // A unit that barely moves on the fitting rows (a ReLU unit alive on one of them) would be blown up by its own
    // spread, and a held-out row where it moves would get an absurd logit; its scale is floored at a tenth of the
    // layer's typical unit spread.
    let sdSq = 0;
    let live = 0;
    for (let c = 0; c < cols; c++) {
      const sd = Math.sqrt((scale[c] as number) / train.length);
      const alive = sd > 1e-12 * (1 + Math.abs(mean[c] as number));
      scale[c] = alive ? sd : 0;
      if (alive) {
        sdSq += sd * sd;
        live++;
      }
    }
    const floor = live > 0 ? SCALE_FLOOR * Math.sqrt(sdSq / live) : 0;
    for (let c = 0; c < cols; c++) {
      const sd = scale[c] as number;
      scale[c] = sd > 0 ? 1 / Math.max(sd, floor) : 0;
    }
    const design = (idx: number[]): FitData => {
      const x = new Float64Array(idx.length * cols);
      const yy = new Int32Array(idx.length);
      idx.forEach((i, a) => {
        const r = used[i]! * cols;
        for (let c = 0; c < cols; c++) x[a * cols + c] = ((acts[r + c] as number) - (mean[c] as number)) * (scale[c] as number);
        yy[a] = y[i] as number;
      });
      return { x, y: yy, n: idx.length, d: cols, k };
    };
    const fit = design(train);
    // Start from the training rows' class frequencies (a class absent there gets a small share).
    const init = new Float64Array(cols * k + k);
    const trainCounts = new Array<number>(k).fill(0);
    for (const i of train) trainCounts[y[i] as number]!++;
    for (let c = 0; c < k; c++) init[cols * k + c] = Math.log((trainCounts[c]! + 0.5) / (train.length + 0.5 * k));
    const p = fitSoftmax(fit, o.l2 ?? 1 / train.length, maxIterations, init);
    const held = design(test);
    const z = new Float64Array(k);
    for (let a = 0; a < held.n; a++) {
      let max = -Infinity;
      let best = 0;
      for (let c = 0; c < k; c++) {
        const v = (p[cols * k + c] as number) + rowDot(held.x, a * cols, p, c * cols, cols);
        z[c] = v;
        if (v > max) {
          max = v;
          best = c;
        }
      }
      let sum = 0;
      for (let c = 0; c < k; c++) sum += Math.exp((z[c] as number) - max);
      // q = (1 − ε)·softmax + ε/K: still a conditional distribution, so still a valid bound, and one confidently
      // wrong row costs at most ln(K/ε) nats instead of any amount.
      const pSoft = Math.exp((z[held.y[a] as number] as number) - max) / sum;
      nats -= Math.log((1 - UNIFORM_SHARE) * pSoft + UNIFORM_SHARE / k);
      if (best === held.y[a]) correct++;
      scored++;
    }
  }
  const ce = nats / scored / LN2;
  const h = hy / LN2;
  return { mi_label_lower: Math.max(0, h - ce), cross_entropy: ce, label_entropy: h, accuracy: correct / scored, ...base };
}
