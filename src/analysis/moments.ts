/**
 * Running moments: Welford's update for scalars, the Chan–Golub–LeVeque merge, and a vector
 * accumulator with a shifted sum of squares for per-coordinate gradient statistics.
 */
import type { SimdFold } from './simd-fold.js';

/** Count, mean and sum of squared deviations of a scalar stream. */
export interface Moments {
  n: number;
  mean: number;
  m2: number;
}

export function emptyMoments(): Moments {
  return { n: 0, mean: 0, m2: 0 };
}

/** Welford (1962): adds `x` to `m` in place. The last factor uses the new mean. */
export function welfordPush(m: Moments, x: number): void {
  m.n += 1;
  const delta = x - m.mean;
  m.mean += delta / m.n;
  m.m2 += delta * (x - m.mean);
}

/** Chan, Golub & LeVeque (1982) pairwise merge; exact in exact arithmetic, order-independent. */
export function mergeMoments(a: Moments, b: Moments): Moments {
  const n = a.n + b.n;
  if (n === 0) return emptyMoments();
  const delta = b.mean - a.mean;
  return {
    n,
    mean: a.mean + (delta * b.n) / n,
    m2: a.m2 + b.m2 + (delta * delta * a.n * b.n) / n,
  };
}

/** Unbiased variance, M2/(n-1); NaN below two values. */
export function sampleVariance(m: Moments): number {
  return m.n < 2 ? Number.NaN : m.m2 / (m.n - 1);
}

/** Population variance, M2/n; NaN for an empty stream. */
export function populationVariance(m: Moments): number {
  return m.n < 1 ? Number.NaN : m.m2 / m.n;
}

/** Number of NaN or ±Infinity entries. */
export function countNonFinite(values: ArrayLike<number>): number {
  // A float64 sum of float32 values cannot overflow, so a finite sum proves every entry finite:
  // one cheap pass in the common case.
  // Four partial sums break the add-latency chain of a single running sum.
  let s0 = 0;
  let s1 = 0;
  let s2 = 0;
  let s3 = 0;
  const len = values.length;
  const end4 = len - (len % 4);
  for (let i = 0; i < end4; i += 4) {
    s0 += values[i]!;
    s1 += values[i + 1]!;
    s2 += values[i + 2]!;
    s3 += values[i + 3]!;
  }
  for (let i = end4; i < len; i++) s0 += values[i]!;
  if (Number.isFinite(s0 + s1 + s2 + s3)) return 0;
  let bad = 0;
  for (let i = 0; i < len; i++) if (!Number.isFinite(values[i]!)) bad++;
  return bad;
}

/**
 * Per-coordinate mean and variance of a stream of equal-length vectors, kept as float64 sums of
 * deviations from a reference vector (the first one pushed). Subtracting the reference before
 * squaring removes the large common offset that makes the naive sum-of-squares formula cancel
 * catastrophically (methods.md §4), at the cost of one sum and one sum of squares per coordinate.
 */
export class ShiftedMoments {
  readonly size: number;
  private n = 0;
  private readonly ref: Float64Array;
  private readonly s1: Float64Array;
  /**
   * Σ over coordinates and vectors of the squared deviations: one number, not one per coordinate, since only
   * the trace of the variance is ever read; this saves a read and a write per coordinate in the hot loop.
   */
  private sq = 0;
  /** Σ‖v_{k+1} − v_k‖² over consecutive vectors pushed in the same block, and how many such pairs. */
  private diffSq = 0;
  private pairs = 0;
  /** The squared differences of the block addBlock last went through. */
  private blockDiffSq = 0;

  /** The SIMD kernel for blocks of four whose vectors it holds (see {@link SimdFold}), or null. */
  private readonly fold: SimdFold | null;

  /**
   * `storage`: where the reference and sums live, when they must sit in a {@link SimdFold}'s memory so
   * that its kernel folds blocks of four held in the same memory; by default, plain arrays.
   */
  constructor(size: number, storage?: { ref: Float64Array; s1: Float64Array; fold: SimdFold }) {
    if (!Number.isInteger(size) || size < 0) throw new RangeError(`size must be a non-negative integer, got ${size}`);
    this.size = size;
    if (storage !== undefined) {
      if (storage.ref.length !== size || storage.s1.length !== size || !storage.fold.holds(storage.ref, storage.s1)) {
        throw new RangeError(`storage must hold ${size} values in the kernel's memory`);
      }
      storage.ref.fill(0);
      storage.s1.fill(0);
    }
    this.ref = storage?.ref ?? new Float64Array(size);
    this.s1 = storage?.s1 ?? new Float64Array(size);
    this.fold = storage?.fold ?? null;
  }

  get count(): number {
    return this.n;
  }

  push(values: ArrayLike<number>): void {
    const len = this.size;
    if (values.length !== len) throw new RangeError(`expected ${len} values, got ${values.length}`);
    const ref = this.ref;
    if (this.n === 0) {
      for (let j = 0; j < len; j++) ref[j] = values[j]!;
      this.n = 1;
      return; // deviations of the reference from itself are zero: s1, sq stay 0
    }
    const s1 = this.s1;
    let y = 0;
    for (let j = 0; j < len; j++) {
      const d = values[j]! - ref[j]!;
      s1[j] = s1[j]! + d;
      y += d * d;
    }
    this.sq += y;
    this.n += 1;
  }

  /**
   * Adds several vectors in one pass: one read-modify-write of the sums per block instead of per
   * vector, which is what makes per-minibatch accumulation cheap. If any value is NaN or infinite
   * nothing is added (partial work is subtracted again) and it returns false.
   */
  pushBlock(block: readonly ArrayLike<number>[]): boolean {
    const m = block.length;
    if (m === 0) return true;
    const len = this.size;
    for (const v of block) if (v.length !== len) throw new RangeError(`expected ${len} values, got ${v.length}`);
    const fresh = this.n === 0;
    if (fresh) {
      const first = block[0]!;
      if (countNonFinite(first) > 0) return false;
      this.adoptReference(first);
    }
    const stop = this.addBlock(block, 1, len);
    if (stop < len) {
      if (fresh) {
        this.s1.fill(0);
        this.sq = 0;
      } else this.addBlock(block, -1, stop);
      return false;
    }
    this.n += m;
    this.diffSq += this.blockDiffSq;
    this.pairs += m - 1;
    return true;
  }

  /**
   * A fresh instance takes `first` as its reference (pushBlock does so with a block's first vector; a
   * {@link SimdFold} that folds every vector's block in one call, `foldAll`, needs it done before).
   */
  adoptReference(first: ArrayLike<number>): void {
    if (this.n > 0) return;
    if (first.length !== this.size) throw new RangeError(`expected ${this.size} values, got ${first.length}`);
    for (let j = 0; j < this.size; j++) this.ref[j] = first[j]!;
  }

  /**
   * After such a fold added a block of `m` vectors to this instance's sums, with every value finite:
   * counts it, with its sum of squared deviations `y` and of consecutive differences `q`.
   */
  recordBlock(m: number, y: number, q: number): void {
    this.sq += y;
    this.n += m;
    this.diffSq += q;
    this.pairs += m - 1;
    this.blockDiffSq = q;
  }

  /**
   * Half the mean squared difference of consecutive vectors (von Neumann et al. 1941, "Distribution of the
   * ratio of the mean square successive difference to the variance", Ann. Math. Statist. 12, from memory),
   * summed over coordinates: for independent draws around a slowly moving mean it estimates the trace of
   * their covariance without the mean's drift. Pairs are taken within each block; NaN without pairs.
   */
  successiveDiffTrace(): number {
    return this.pairs > 0 ? this.diffSq / (2 * this.pairs) : Number.NaN;
  }

  /** Consecutive pairs behind {@link successiveDiffTrace}. */
  get diffPairs(): number {
    return this.pairs;
  }

  /** Takes back a block added by {@link pushBlock} (up to float64 rounding of the sums). */
  unpushBlock(block: readonly ArrayLike<number>[]): void {
    const m = block.length;
    if (m === 0) return;
    if (m > this.n) throw new RangeError(`cannot remove ${m} vectors from ${this.n}`);
    this.n -= m;
    // The block was this instance's last pushBlock, so blockDiffSq is what it added to the pairs.
    this.diffSq -= this.blockDiffSq;
    this.pairs -= m - 1;
    if (this.n === 0) {
      this.s1.fill(0);
      this.sq = 0;
      this.diffSq = 0;
      this.pairs = 0;
    } else this.addBlock(block, -1, this.size);
  }

  /**
   * s1 += sign·Σ d over coordinates [0, end) and sq += sign·Σ d² over the same; stops before the first
   * coordinate whose contribution is not finite and returns its index (`end` when all were finite).
   */
  private addBlock(block: readonly ArrayLike<number>[], sign: 1 | -1, end: number): number {
    const { ref, s1 } = this;
    let q = 0;
    let y = 0;
    if (block.length === 4) {
      const [a, b, c, e] = block as [ArrayLike<number>, ArrayLike<number>, ArrayLike<number>, ArrayLike<number>];
      const fold = this.fold;
      if (end === this.size && fold !== null && fold.owns(a) && fold.owns(b) && fold.owns(c) && fold.owns(e)) {
        // The kernel does the same sums two coordinates at a time, over the whole vector.
        const done = fold.fold4([a, b, c, e], ref, s1, sign);
        if (Number.isFinite(done.y) && Number.isFinite(done.q)) {
          this.sq += sign * done.y;
          this.blockDiffSq = done.q;
          return end;
        }
        // It added the finite coordinates only: take exactly those back, and add nothing.
        fold.fold4([a, b, c, e], ref, s1, sign === 1 ? -1 : 1);
        return 0;
      }
      for (let j = 0; j < end; j++) {
        const r = ref[j]!;
        const d1 = a[j]! - r;
        const d2 = b[j]! - r;
        const d3 = c[j]! - r;
        const d4 = e[j]! - r;
        const x = d1 + d2 + d3 + d4;
        // x − x is 0 for finite x and NaN for NaN or ±Infinity; any bad d makes x bad.
        if (x - x !== 0) {
          this.sq += sign * y;
          return j;
        }
        s1[j] = s1[j]! + sign * x;
        y += d1 * d1 + d2 * d2 + d3 * d3 + d4 * d4;
        const u = d2 - d1;
        const v = d3 - d2;
        const w = d4 - d3;
        q += u * u + v * v + w * w;
      }
      this.sq += sign * y;
      this.blockDiffSq = q;
      return end;
    }
    const m = block.length;
    for (let j = 0; j < end; j++) {
      const r = ref[j]!;
      let x = 0;
      let yj = 0;
      let prev = 0;
      for (let k = 0; k < m; k++) {
        const d = block[k]![j]! - r;
        x += d;
        yj += d * d;
        if (k > 0) q += (d - prev) * (d - prev);
        prev = d;
      }
      if (x - x !== 0) {
        this.sq += sign * y;
        return j;
      }
      s1[j] = s1[j]! + sign * x;
      y += yj;
    }
    this.sq += sign * y;
    this.blockDiffSq = q;
    return end;
  }

  reset(): void {
    this.n = 0;
    this.s1.fill(0);
    this.sq = 0;
    this.diffSq = 0;
    this.pairs = 0;
  }

  mean(): Float64Array {
    const out = new Float64Array(this.size);
    if (this.n === 0) return out.fill(Number.NaN);
    for (let j = 0; j < this.size; j++) out[j] = this.ref[j]! + this.s1[j]! / this.n;
    return out;
  }

  /** Squared Euclidean norm of the mean vector, ||m||². */
  meanSquaredNorm(): number {
    if (this.n === 0) return Number.NaN;
    let acc = 0;
    const n = this.n;
    for (let j = 0; j < this.size; j++) {
      const m = this.ref[j]! + this.s1[j]! / n;
      acc += m * m;
    }
    return acc;
  }

  /** Sum over coordinates of the unbiased variance: the trace of the sample covariance. */
  varianceTrace(): number {
    const n = this.n;
    if (n < 2) return Number.NaN;
    let between = 0;
    for (let j = 0; j < this.size; j++) {
      const a = this.s1[j]!;
      between += a * a;
    }
    // Σ_j (s2_j − s1_j²/n): shifted sums keep both terms at the spread's scale, so round-off stays at the
    // level of float64 epsilon; clamp what is left of it.
    const m2 = this.sq - between / n;
    if (Number.isNaN(m2)) return Number.NaN;
    return Math.max(0, m2) / (n - 1);
  }
}
