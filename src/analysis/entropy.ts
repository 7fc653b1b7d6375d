/**
 * Discrete entropy from counts, in bits: the plug-in (maximum-likelihood) estimate, the Miller–Madow
 * bias correction (G. A. Miller 1955, "Note on the bias of information estimates"; discussed in
 * L. Paninski 2003, Neural Computation 15:1191–1253), and the binary entropy function
 * (Cover & Thomas, Elements of Information Theory, 2nd ed. 2006). methods.md §6.1.
 */

/** ln 2, for converting nats to bits (divide) and bits to nats (multiply). */
export const LN2 = Math.LN2;

/** Plug-in entropy with its ingredients, all from one pass over the counts. */
export interface CountEntropy {
  /** −Σ p log2 p over the non-zero counts, p = count / total. 0 when total is 0. */
  bits: number;
  /** Σ counts. */
  total: number;
  /** m̂, the number of non-zero counts (occupied bins). */
  occupied: number;
}

/**
 * Plug-in entropy of the empirical distribution given by `counts` (non-negative; zero counts are
 * skipped), with the total and the number of occupied bins.
 */
export function countEntropy(counts: Iterable<number>): CountEntropy {
  let total = 0;
  let sumNlogN = 0;
  let occupied = 0;
  for (const c of counts) {
    if (c > 0) {
      total += c;
      sumNlogN += c * Math.log2(c);
      occupied++;
    }
  }
  // H = log2 N − (1/N) Σ n log2 n: one log per bin, and exact when the counts are powers of two.
  const bits = total > 0 ? Math.log2(total) - sumNlogN / total : 0;
  // Rounding can leave −1e-16 for a single occupied bin; entropy is never negative.
  return { bits: Math.max(0, bits), total, occupied };
}

/**
 * The Miller–Madow term (m̂ − 1)/(2N) nats, returned in bits: add it to a plug-in entropy of N samples
 * over m̂ occupied bins. 0 when N is 0. It is not capped: on N distinct samples the corrected value
 * exceeds log2 N (methods.md §6.3: 8 singletons give 3.631179 bits), because it estimates the
 * entropy of the population the samples came from, not of the samples themselves.
 */
export function millerMadowBits(occupied: number, total: number): number {
  if (!(total > 0) || occupied <= 1) return 0;
  return (occupied - 1) / (2 * total) / LN2;
}

/** Entropy of `counts` in bits: plug-in, or Miller–Madow corrected when `millerMadow` is set. */
export function entropyFromCounts(counts: Iterable<number>, options: { millerMadow?: boolean } = {}): number {
  const e = countEntropy(counts);
  return options.millerMadow === true ? e.bits + millerMadowBits(e.occupied, e.total) : e.bits;
}

/**
 * Binary entropy H_b(p) = −p log2 p − (1−p) log2(1−p) in bits, with 0·log 0 = 0.
 * NaN outside [0, 1]. The binary symmetric channel with crossover p has capacity 1 − H_b(p).
 */
export function binaryEntropy(p: number): number {
  if (!(p >= 0 && p <= 1)) return Number.NaN;
  if (p === 0 || p === 1) return 0;
  return -(p * Math.log2(p) + (1 - p) * Math.log2(1 - p));
}
