/**
 * The float64 JavaScript accumulator on the cpu backend, in its two ways of folding a block of four
 * minibatches (the JavaScript loop, the WebAssembly SIMD kernel), against the textbook two-pass formulas (mean, then squared deviations) over the gradients it
 * kept; a step with a NaN in one layer is left out of that layer only.
 */
import { beforeAll, describe, expect, it } from 'vitest';
import { JsAccumulator, type JsAccumulatorOptions } from '../../src/callback/js-accumulator.js';
import { viewModel } from '../../src/callback/model-layers.js';
import { denseModel, useCpu } from '../helpers/tf.js';
import { expectTwoPass, feedSteps } from '../helpers/two-pass.js';

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
    // Two windows: 11 steps (two blocks and three left for the close), with a NaN at step 6 in variable 2; then 6.
    for (const steps of [11, 6]) {
      const kept = feedSteps(acc, view, steps, { seed: 90, mean: 0.3, ...(steps === 11 ? { bad: { step: 6, variable: 2 } } : {}) });
      const out = await acc.close();
      expectTwoPass(out, view, kept, (i) => (steps === 11 && i === 2 ? 1 : 0));
      expect(out.map((o) => o.count)).toEqual(steps === 11 ? [11, 11, 10, 10] : [6, 6, 6, 6]);
    }
    acc.dispose();
    model.dispose();
  });
});
