/**
 * The textbook two-pass statistics of a set of vectors (Chan, Golub & LeVeque 1983, "Algorithms for
 * computing the sample variance", the two-pass algorithm; from memory): per coordinate the mean, then the
 * squared deviations from it. The reference the accumulators' one-pass sums are checked against.
 */
export function twoPass(rows: readonly ArrayLike<number>[], size: number): { varianceTrace: number; meanSquaredNorm: number } {
  let varianceTrace = 0;
  let meanSquaredNorm = 0;
  for (let j = 0; j < size; j++) {
    let m = 0;
    for (const r of rows) m += r[j]!;
    m /= rows.length;
    let ss = 0;
    for (const r of rows) ss += (r[j]! - m) ** 2;
    varianceTrace += ss / (rows.length - 1);
    meanSquaredNorm += m * m;
  }
  return { varianceTrace, meanSquaredNorm };
}
