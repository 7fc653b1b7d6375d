/**
 * Pairwise-distance bounds on the entropy of a Gaussian mixture (A. Kolchinsky & B. D. Tracey 2017,
 * "Estimating Mixture Entropy with Pairwise Distances", Entropy 19(7):361), and through them bounds on a
 * layer's I(X;T) when Gaussian noise is added to its activations (the use in Saxe et al. 2018, "On the
 * Information Bottleneck Theory of Deep Learning"). methods.md §6.2.
 *
 * For a mixture Σ_i c_i p_i the estimator is Ĥ_D = H(X|C) − Σ_i c_i ln Σ_j c_j exp(−D(p_i‖p_j)). With D the
 * KL divergence it is an upper bound on the mixture entropy, with D the Bhattacharyya distance a lower bound.
 * For N(μ_i, σ²I_d) components: H(p_i) = (d/2) ln(2πeσ²), KL = ‖μ_i−μ_j‖²/(2σ²), Bhattacharyya = ‖μ_i−μ_j‖²/(8σ²);
 * so the KL bound at σ equals the Bhattacharyya bound at σ/2.
 *
 * The noise: an absolute σ² (`noiseVariance`) means different things for a tanh and a ReLU layer, or for 8
 * and 300 units: with d units of per-unit spread s², ‖h_i − h_j‖² ≈ 2·d·s², so exp(−‖·‖²/(2σ²)) vanishes for
 * a wide layer and every row becomes its own component (the bounds sit at log2 P). The default instead takes
 * σ² = r·V (`noiseRatio` r), V the layer's total variance over the rows used (the mean of ‖h_i − h̄‖², the
 * trace of the activation covariance). Derivation (here): the bounds then depend on h only through
 * ‖h_i − h_j‖²/V, so they are invariant to rescaling h; for Gaussian h ~ N(0, s²I_d) the true value is
 * I = (d/2)·log2(1 + 1/(r·d)) (Cover & Thomas 2006, ch. 9), which grows to 1/(2·r·ln 2) bits as d grows
 * instead of to log2 P; for K tight, equidistant clusters the pairwise exponent is K/((K−1)·r).
 *
 * Cost: O(P²·d) for P rows of d units (one pass over the pairs gives both bounds and the per-class sums).
 * Every sum Σ_j exp(−D_ij) holds its own j = i term exp(0) = 1, which is also its largest term: that is the
 * log-sum-exp shift already, so the sums never underflow to 0 and the logs never see 0.
 */

import { subsample } from './random.js';
import { TidemarkRangeError, TidemarkTypeError } from '../errors.js';
import { checkActivations, checkInteger, checkOptionNames, compactClasses, finiteRows, SATURATION_MARGIN_BITS } from './binned-information.js';
import { LN2 } from './entropy.js';

/** Mixture entropy bounds, nats. */
export interface MixtureEntropyBounds {
  /** KL-based estimate: an upper bound on the mixture entropy. */
  upper: number;
  /** Bhattacharyya-based estimate: a lower bound on the mixture entropy. */
  lower: number;
  /** H(X|C) = (d/2) ln(2πeσ²), the entropy of one component; both bounds lie in [H(X|C), H(X|C) + H(C)]. */
  conditional: number;
}

/**
 * Default `noiseRatio`, chosen from two formulas (derived here; the margins are our choice, no source). When a
 * wide layer's distances concentrate at ‖h_i − h_j‖² ≈ 2V, the KL exponent is 1/r, and with P rows the upper
 * bound reads log2 P − log2(1 + (P − 1)·e^(−1/r)): at the probe's 512 rows it stays ≥ 1 bit below log2 P
 * only for r ≥ 1/ln 511 ≈ 0.16 (at r = 0.1 it reads 8.97 of 9 bits: at the cap). K tight, equidistant class
 * clusters keep I(T;Y) = log2 K − log2(1 + (K − 1)·e^(−K/((K−1)·r))), within 0.1 bit of log2 K for K ≤ 10 only
 * for r ≤ 0.23. 0.2 meets both: 6.85 bits at 512 rows in the wide limit, 0.05 bit lost at K = 10.
 */
export const DEFAULT_NOISE_RATIO = 0.2;

export interface PairwiseInformationOptions {
  /**
   * σ² of the noise as a share of the layer's spread: σ² = noiseRatio × V, V = (1/P)·Σ_i ‖h_i − h̄‖² over the
   * rows used (the trace of their covariance), > 0. The estimates are then invariant to rescaling the
   * activations and stay below log2 P on wide layers. Default {@link DEFAULT_NOISE_RATIO} (0.2) when
   * `noiseVariance` is not given; passing both is an error.
   */
  noiseRatio?: number;
  /**
   * An absolute σ² of the Gaussian noise added to each unit, > 0, in place of `noiseRatio`. No default: when
   * neither is given, `noiseRatio` applies. (Saxe et al. 2018 used an absolute σ², 0.1 as we recall it, from
   * memory.)
   */
  noiseVariance?: number;
  /**
   * At most this many rows enter the O(P²·d) sums; a larger probe is subsampled, without replacement, with a
   * seeded generator (so repeated calls pick the same rows). Default 2048. The bounds then describe the
   * subsample: they are capped at log2(maxRows), not log2 of the probe size.
   */
  maxRows?: number;
  /** Seed of the subsample. Default 0. */
  seed?: number;
}

export interface PairwiseInformation {
  /** KL-based upper bound on I(X;T) for T = h(X) + N(0, σ²I), X uniform over the rows used; bits. */
  mi_input_upper: number;
  /** Bhattacharyya-based lower bound on the same I(X;T); bits. */
  mi_input_lower: number;
  /**
   * Estimate of I(T;Y) as Ĥ(T) − Σ_y p(y)·Ĥ(T|Y=y), both from the KL (upper-bound) form; bits. A difference of
   * two upper bounds is not a bound: this is an estimate only (methods.md §6.2).
   */
  mi_label: number;
  /** The lower bound within {@link SATURATION_MARGIN_BITS} of log2(rows): every row is told apart, noise or not. */
  saturated: boolean;
  /** Rows used (after dropping and subsampling). */
  rows: number;
  /** Rows left out because an activation was NaN or ±Infinity. */
  dropped: number;
  /** Whether the finite rows were more than `maxRows` and a subsample was used. */
  subsampled: boolean;
  /** The σ² used: `noiseVariance`, or noiseRatio × the rows' total variance (0 when all rows are identical). */
  noise_variance: number;
  /** The ratio σ²/V used; null when an absolute `noiseVariance` was given. */
  noise_ratio: number | null;
  estimator: 'pairwise-kolchinsky-tracey';
}

interface PairSums {
  /** Σ_j w_j exp(−‖h_i−h_j‖²/(2σ²)) per row i (KL form). */
  kl: Float64Array;
  /** Σ_j w_j exp(−‖h_i−h_j‖²/(8σ²)) per row i (Bhattacharyya form). */
  bh: Float64Array;
  /** Σ_{j in i's class} exp(−‖h_i−h_j‖²/(2σ²)) per row i, unweighted; only when classes are given. */
  klClass: Float64Array | null;
}

/**
 * One pass over the pairs of rows `idx` of the row-major matrix `data` (`cols` wide). `w` weights row j
 * (by position in idx); `cls` gives each position's class, or null.
 */
function pairSums(
  data: ArrayLike<number>,
  cols: number,
  idx: readonly number[],
  w: Float64Array,
  cls: Int32Array | null,
  variance: number,
): PairSums {
  const p = idx.length;
  // Copy the used rows into one contiguous buffer: the inner loop then reads sequential doubles.
  const h = new Float64Array(p * cols);
  for (let a = 0; a < p; a++) {
    const src = (idx[a] as number) * cols;
    for (let c = 0; c < cols; c++) h[a * cols + c] = data[src + c] as number;
  }
  const kl = new Float64Array(p);
  const bh = new Float64Array(p);
  const klClass = cls !== null ? new Float64Array(p) : null;
  // Divide rather than multiply by 1/(8σ²): a denormal σ² would make that reciprocal Infinity and 0·Infinity NaN.
  const var8 = 8 * variance;
  const cols4 = cols - (cols % 4);
  for (let i = 0; i < p; i++) {
    kl[i] = (kl[i] as number) + (w[i] as number);
    bh[i] = (bh[i] as number) + (w[i] as number);
    if (klClass !== null) klClass[i] = (klClass[i] as number) + 1;
    const bi = i * cols;
    for (let j = i + 1; j < p; j++) {
      const bj = j * cols;
      // Differences, not ‖a‖² + ‖b‖² − 2a·b: no cancellation for close rows. Four accumulators let the
      // additions overlap (about 1.5–2× faster in V8 at 128 units).
      let s0 = 0;
      let s1 = 0;
      let s2 = 0;
      let s3 = 0;
      let c = 0;
      for (; c < cols4; c += 4) {
        const d0 = (h[bi + c] as number) - (h[bj + c] as number);
        const d1 = (h[bi + c + 1] as number) - (h[bj + c + 1] as number);
        const d2 = (h[bi + c + 2] as number) - (h[bj + c + 2] as number);
        const d3 = (h[bi + c + 3] as number) - (h[bj + c + 3] as number);
        s0 += d0 * d0;
        s1 += d1 * d1;
        s2 += d2 * d2;
        s3 += d3 * d3;
      }
      for (; c < cols; c++) {
        const d = (h[bi + c] as number) - (h[bj + c] as number);
        s0 += d * d;
      }
      const d2 = s0 + s1 + s2 + s3;
      // exp(−d²/(2σ²)) = exp(−d²/(8σ²))⁴: one exp per pair for both forms.
      const eb = Math.exp(-d2 / var8);
      const e2 = eb * eb;
      const ek = e2 * e2;
      kl[i] = (kl[i] as number) + (w[j] as number) * ek;
      kl[j] = (kl[j] as number) + (w[i] as number) * ek;
      bh[i] = (bh[i] as number) + (w[j] as number) * eb;
      bh[j] = (bh[j] as number) + (w[i] as number) * eb;
      if (klClass !== null && cls !== null && cls[i] === cls[j]) {
        klClass[i] = (klClass[i] as number) + ek;
        klClass[j] = (klClass[j] as number) + ek;
      }
    }
  }
  return { kl, bh, klClass };
}

function checkVariance(where: string, name: string, v: unknown, what = 'a variance σ²'): number {
  if (typeof v !== 'number') {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `${where}: option '${name}' must be a number; received ${String(v)}.`);
  }
  if (!(v > 0) || !Number.isFinite(v)) {
    throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', `${where}: option '${name}' must be a finite number > 0 (${what}); received ${String(v)}.`);
  }
  return v;
}

/**
 * (1/P)·Σ_i ‖h_i − h̄‖² over the rows `idx` of the row-major `data`: the trace of their (population)
 * covariance. Two passes, mean first, so a large common offset does not cancel the spread away.
 */
function totalVariance(data: ArrayLike<number>, cols: number, idx: readonly number[]): number {
  const p = idx.length;
  const mean = new Float64Array(cols);
  for (const r of idx) for (let c = 0; c < cols; c++) mean[c] = (mean[c] as number) + (data[r * cols + c] as number);
  for (let c = 0; c < cols; c++) mean[c] = (mean[c] as number) / p;
  let ss = 0;
  for (const r of idx) {
    for (let c = 0; c < cols; c++) {
      const d = (data[r * cols + c] as number) - (mean[c] as number);
      ss += d * d;
    }
  }
  return ss / p;
}

/**
 * Kolchinsky–Tracey bounds on the entropy (nats) of the mixture Σ_i c_i N(μ_i, σ²I_d), μ_i the rows of the
 * row-major `k × d` matrix `means`, c_i = `weights` (default uniform; normalised here).
 *
 * @throws TidemarkRangeError (`TIDEMARK_ERR_OPTION_INVALID`) for a shape that does not fit, a variance that is
 *   not > 0, or weights of another length, negative, or summing to 0.
 */
export function gaussianMixtureEntropyBounds(
  means: ArrayLike<number>,
  shape: readonly [number, number],
  variance: number,
  weights?: ArrayLike<number>,
): MixtureEntropyBounds {
  const where = 'gaussianMixtureEntropyBounds';
  const [k, d] = checkActivations(where, means, shape, null);
  checkVariance(where, 'variance', variance);
  const w = new Float64Array(k);
  if (weights !== undefined) {
    if (weights.length !== k) {
      throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', `${where}: ${weights.length} weights for ${k} components; pass one weight per row.`);
    }
    let total = 0;
    for (let i = 0; i < k; i++) {
      const c = weights[i] as number;
      if (!(c >= 0) || !Number.isFinite(c)) {
        throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', `${where}: weights[${i}] is ${String(c)}; weights must be finite and ≥ 0.`);
      }
      total += c;
    }
    if (!(total > 0)) throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', `${where}: the weights sum to 0.`);
    for (let i = 0; i < k; i++) w[i] = (weights[i] as number) / total;
  } else w.fill(1 / k);
  const conditional = (d / 2) * Math.log(2 * Math.PI * Math.E * variance);
  const idx = Array.from({ length: k }, (_, i) => i);
  const s = pairSums(means, d, idx, w, null, variance);
  let up = 0;
  let lo = 0;
  for (let i = 0; i < k; i++) {
    const c = w[i] as number;
    if (c === 0) continue;
    up -= c * Math.log(s.kl[i] as number);
    lo -= c * Math.log(s.bh[i] as number);
  }
  return { upper: conditional + up, lower: conditional + lo, conditional };
}

const OPTION_NAMES = ['noiseRatio', 'noiseVariance', 'maxRows', 'seed'] as const;

/**
 * Bounds on I(X;T) and an estimate of I(T;Y), in bits, for the noisy layer T = h(X) + N(0, σ²I) with X uniform
 * over the probe rows (methods.md §6.2), σ² = noiseRatio × the rows' total variance (default) or an absolute
 * `noiseVariance`:
 *   I(X;T) ≤ −(1/P) Σ_i log[(1/P) Σ_j exp(−‖h_i−h_j‖²/(2σ²))]   (KL, upper)
 *   I(X;T) ≥ the same with 8σ² in place of 2σ²                   (Bhattacharyya, lower)
 * H(T|X) = (d/2) ln(2πeσ²) cancels from every difference, so it never enters.
 *
 * Rows with a NaN or infinite activation are dropped (`dropped`); more than `maxRows` finite rows are
 * subsampled (`subsampled`). With no row left every value is NaN. With a ratio and rows that are all
 * identical (total variance 0) there is no noise to scale and nothing to tell apart: every value is 0.
 *
 * @throws TidemarkTypeError / TidemarkRangeError (`TIDEMARK_ERR_OPTION_INVALID`) for a shape that does not fit,
 *   labels of another length or not class indices, a noise variance or ratio that is not > 0, both of them
 *   given, `maxRows` < 1;
 *   TidemarkTypeError (`TIDEMARK_ERR_OPTION_UNKNOWN`) for a misspelt option.
 */
export function pairwiseInformationBounds(
  acts: ArrayLike<number>,
  shape: readonly [number, number],
  labels: ArrayLike<number>,
  options: PairwiseInformationOptions = {},
): PairwiseInformation {
  const where = 'pairwiseInformationBounds';
  checkOptionNames(where, options, OPTION_NAMES);
  const [rows, cols] = checkActivations(where, acts, shape, labels);
  // An option given as undefined counts as not given (as in option-check.ts).
  if (options.noiseVariance !== undefined && options.noiseRatio !== undefined) {
    throw new TidemarkTypeError(
      'TIDEMARK_ERR_OPTION_INVALID',
      `${where}: options 'noiseRatio' (${String(options.noiseRatio)}) and 'noiseVariance' (${String(options.noiseVariance)}) were both given; pass one: noiseRatio for σ² relative to the layer's spread, or noiseVariance for an absolute σ².`,
    );
  }
  const ratio = options.noiseVariance === undefined ? checkVariance(where, 'noiseRatio', options.noiseRatio ?? DEFAULT_NOISE_RATIO, 'a share of the total variance') : null;
  const absolute = options.noiseVariance === undefined ? null : checkVariance(where, 'noiseVariance', options.noiseVariance);
  const maxRows = checkInteger(where, 'maxRows', options.maxRows ?? 2048, 1);
  const seed = checkInteger(where, 'seed', options.seed ?? 0);

  let finite = finiteRows(acts, rows, cols);
  const dropped = rows - finite.length;
  const subsampled = finite.length > maxRows;
  if (subsampled) finite = subsample(finite, maxRows, seed);
  const p = finite.length;
  const variance = absolute ?? (p === 0 ? Number.NaN : (ratio as number) * totalVariance(acts, cols, finite));
  const base = { dropped, subsampled, noise_variance: variance, noise_ratio: ratio, estimator: 'pairwise-kolchinsky-tracey' as const };
  // No rows, or a spread too large for a double (|h| ≳ 1e154; float32 activations cannot get there).
  if (p === 0 || !Number.isFinite(variance)) {
    const nan = Number.NaN;
    return { mi_input_upper: nan, mi_input_lower: nan, mi_label: nan, saturated: false, rows: p, ...base };
  }
  // Identical rows under a ratio: σ² = 0 and every distance 0. T is then one component, so I(X;T) = I(T;Y) = 0
  // exactly (the limit as the rows merge); answering directly avoids 0/0 in the exponents.
  if (!(variance > 0)) {
    return { mi_input_upper: 0, mi_input_lower: 0, mi_label: 0, saturated: Math.log2(p) <= SATURATION_MARGIN_BITS, rows: p, ...base };
  }

  const { cls, sizes: classSize } = compactClasses(labels, finite);
  const w = new Float64Array(p).fill(1 / p);
  const s = pairSums(acts, cols, finite, w, cls, variance);
  let up = 0;
  let lo = 0;
  let condUp = 0; // Σ_y p(y)·Î(X;T|Y=y) = (1/P) Σ_i −ln[(1/P_y) Σ_{j∈y} exp(…)]
  for (let i = 0; i < p; i++) {
    up -= Math.log(s.kl[i] as number);
    lo -= Math.log(s.bh[i] as number);
    const py = classSize[cls[i] as number] as number;
    condUp -= Math.log((s.klClass as Float64Array)[i] as number / py);
  }
  up /= p;
  lo /= p;
  condUp /= p;
  const upper = up / LN2;
  const lower = lo / LN2;
  return {
    mi_input_upper: upper,
    mi_input_lower: lower,
    mi_label: (up - condUp) / LN2,
    saturated: lower >= Math.log2(p) - SATURATION_MARGIN_BITS,
    rows: p,
    ...base,
  };
}
