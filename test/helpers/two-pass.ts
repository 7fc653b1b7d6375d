/**
 * The textbook two-pass statistics of a set of vectors (Chan, Golub & LeVeque 1983, "Algorithms for
 * computing the sample variance", the two-pass algorithm; from memory): per coordinate the mean, then the
 * squared deviations from it. The reference the accumulators' one-pass sums are checked against.
 */
import { expect } from 'vitest';
import type { Accumulator, RawVariableWindow } from '../../src/callback/accumulator.js';
import type { ModelView } from '../../src/callback/model-layers.js';
import { tf } from './tf.js';

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

/**
 * Feeds `steps` minibatch gradients of seeded normal values to an accumulator (as the tap would), with a
 * NaN in one variable at one step when `bad` says so. Returns, per variable, the gradients a correct
 * accumulator keeps: all but that step's, for every variable of the bad variable's layer.
 */
export function feedSteps(
  acc: Accumulator,
  view: ModelView,
  steps: number,
  options: { seed: number; mean: number; bad?: { step: number; variable: number } },
): Float32Array[][] {
  const kept: Float32Array[][] = view.variables.map(() => []);
  const bad = options.bad;
  const badLayer = bad === undefined ? null : view.variables[bad.variable]!.layer;
  for (let k = 0; k < steps; k++) {
    const values = view.variables.map((v, i) => {
      const g = Float32Array.from(tf.randomNormal(v.variable.shape, options.mean, 1, 'float32', options.seed + 13 * k + i).dataSync());
      if (bad !== undefined && k === bad.step && i === bad.variable) g[1] = Number.NaN;
      return g;
    });
    values.forEach((g, i) => {
      if (!(bad !== undefined && k === bad.step && view.variables[i]!.layer === badLayer)) kept[i]!.push(g);
    });
    const tensors = view.variables.map((v, i) => tf.tensor(values[i]!, v.variable.shape));
    acc.before(view.variables.map((v, i) => [v.variable.name, tensors[i]!] as const), false);
    acc.after(false);
    tf.dispose(tensors);
  }
  return kept;
}

/** The window's numbers against the two-pass statistics of what was kept, and its non-finite counts. */
export function expectTwoPass(out: readonly RawVariableWindow[], view: ModelView, kept: Float32Array[][], nonfinite: (i: number) => number): void {
  view.variables.forEach((v, i) => {
    const rows = kept[i]!;
    const want = twoPass(rows, v.size);
    expect(out[i]!.count).toBe(rows.length);
    expect(out[i]!.nonfinite).toBe(nonfinite(i));
    expect(out[i]!.varianceTrace / want.varianceTrace).toBeCloseTo(1, 9);
    expect(out[i]!.meanSquaredNorm / want.meanSquaredNorm).toBeCloseTo(1, 9);
  });
}
