/**
 * The float64 JavaScript accumulator on the cpu backend, in its two ways of folding a block of four
 * minibatches (the JavaScript loop, the WebAssembly SIMD kernel), against the textbook two-pass formulas (mean, then squared deviations) over the gradients it
 * kept; a step with a NaN in one layer is left out of that layer only.
 */
import { beforeAll, describe, expect, it } from 'vitest';
import { JsAccumulator, type JsAccumulatorOptions } from '../../src/callback/js-accumulator.js';
import { viewModel } from '../../src/callback/model-layers.js';
import { denseModel, tf, useCpu } from '../helpers/tf.js';
import { twoPass } from '../helpers/two-pass.js';

beforeAll(useCpu);

const WAYS: [string, JsAccumulatorOptions, string][] = [
  ['the JavaScript loop', { kernel: false }, 'js'],
  ['the WebAssembly SIMD kernel', {}, 'simd'],
];

describe('JsAccumulator on cpu', () => {
  it.each(WAYS)('folds with %s to the two-pass formulas, leaving out only the layer with a NaN', async (_name, options, folding) => {
    const model = denseModel({ inputs: 5, hidden: [7], outputs: 3, seed: 11 });
    const view = viewModel(model);
    const acc = new JsAccumulator(view, options);
    expect(acc.folding).toBe(folding);
    const kept: Float32Array[][] = view.variables.map(() => []);
    const badLayer = view.variables[2]!.layer;
    // Two windows: 11 steps (two blocks and three left for the close), then 6.
    for (const steps of [11, 6]) {
      for (const k of kept) k.length = 0;
      for (let k = 0; k < steps; k++) {
        const values = view.variables.map((v, i) => {
          const g = Float32Array.from(tf.randomNormal(v.variable.shape, 0.3, 1, 'float32', 90 + 13 * k + i).dataSync());
          if (k === 6 && i === 2) g[1] = Number.NaN;
          return g;
        });
        values.forEach((g, i) => {
          if (!(k === 6 && view.variables[i]!.layer === badLayer)) kept[i]!.push(g);
        });
        const tensors = view.variables.map((v, i) => tf.tensor(values[i]!, v.variable.shape));
        acc.before(view.variables.map((v, i) => [v.variable.name, tensors[i]!] as const), false);
        acc.after(false);
        tf.dispose(tensors);
      }
      const out = await acc.close();
      view.variables.forEach((v, i) => {
        const rows = kept[i]!;
        const want = twoPass(rows, v.size);
        expect(out[i]!.count).toBe(rows.length);
        expect(out[i]!.nonfinite).toBe(steps === 11 && i === 2 ? 1 : 0);
        expect(out[i]!.varianceTrace / want.varianceTrace).toBeCloseTo(1, 9);
        expect(out[i]!.meanSquaredNorm / want.meanSquaredNorm).toBeCloseTo(1, 9);
      });
      expect(out.map((o) => o.count)).toEqual(steps === 11 ? [11, 11, 10, 10] : [6, 6, 6, 6]);
    }
    acc.dispose();
    model.dispose();
  });
});
