import { describe, expect, it } from 'vitest';
import { labelClasses, oneHotToClasses, quantileBins } from '../../src/analysis/label-bins.js';
import { mulberry32 } from '../helpers/random.js';

// What these check is definitional (argmax of a one-hot row; sample quantiles split a sample into equal
// counts, ties aside), so no outside values are needed; the equal-count rule for quantile bins is the
// definition of a sample quantile (common practice, no source).

function countsOf(classes: Int32Array, k: number): number[] {
  const out = new Array<number>(k).fill(0);
  for (const c of classes) out[c] = (out[c] as number) + 1;
  return out;
}

describe('labelClasses', () => {
  it('turns one-hot rows into class indices', () => {
    const oneHot = [1, 0, 0, 0, 0, 1, 0, 1, 0, 0, 0, 1];
    const r = labelClasses(oneHot, [4, 3]);
    expect(Array.from(r.classes)).toEqual([0, 2, 1, 2]);
    expect(r).toMatchObject({ count: 3, kind: 'onehot' });
  });

  it('takes the argmax of soft labels, first column on ties', () => {
    expect(Array.from(oneHotToClasses([0.2, 0.5, 0.3, 0.5, 0.5, 0], 2, 3))).toEqual([1, 0]);
  });

  it('passes sparse class indices through', () => {
    const r = labelClasses(Int32Array.from([2, 0, 1, 2]), [4, 1]);
    expect(Array.from(r.classes)).toEqual([2, 0, 1, 2]);
    expect(r).toMatchObject({ count: 3, kind: 'sparse' });
  });

  it('reads one column of non-integers as a regression target and bins it by quantiles', () => {
    const r = labelClasses([0.5, 3.2, -1.1, 2.2], [4, 1], { bins: 2 });
    expect(r.kind).toBe('regression');
    expect(Array.from(r.classes)).toEqual([0, 1, 0, 1]);
  });

  it("bins integer targets as regression when asked to with kind 'regression'", () => {
    const r = labelClasses([5, 1, 3, 7, 2, 9], [6, 1], { kind: 'regression', bins: 3 });
    expect(Array.from(r.classes)).toEqual([1, 0, 1, 2, 0, 2]);
    expect(r.count).toBe(3);
  });

  it('rejects bad shapes, bad sparse labels, multi-column regression and misspelt options', () => {
    expect(() => labelClasses([0, 1, 2], [2, 1])).toThrow(expect.objectContaining({ code: 'TIDEMARK_ERR_OPTION_INVALID', name: 'TidemarkRangeError' }));
    expect(() => labelClasses([0, 1.5], [2, 1], { kind: 'sparse' })).toThrow(
      expect.objectContaining({ code: 'TIDEMARK_ERR_OPTION_INVALID', message: 'labelClasses: targets[1] is 1.5; sparse labels must be non-negative integers.' }),
    );
    expect(() => labelClasses([0, 1, 2, 3], [2, 2], { kind: 'regression' })).toThrow(
      expect.objectContaining({ code: 'TIDEMARK_ERR_OPTION_INVALID', message: 'labelClasses: regression targets need one column; received 2 columns.' }),
    );
    expect(() => labelClasses([0, 1], [2, 1], { bins: 1 })).toThrow(expect.objectContaining({ code: 'TIDEMARK_ERR_OPTION_INVALID' }));
    expect(() => labelClasses([0, 1], [2, 1], { kinds: 'sparse' } as never)).toThrow(
      expect.objectContaining({ code: 'TIDEMARK_ERR_OPTION_UNKNOWN', message: expect.stringContaining("Did you mean 'kind'?") as unknown }),
    );
    expect(() => labelClasses([0, Number.NaN], [2, 1], { kind: 'regression' })).toThrow(
      expect.objectContaining({ code: 'TIDEMARK_ERR_OPTION_INVALID', name: 'TidemarkRangeError' }),
    );
  });
});

describe('quantileBins', () => {
  it('gives equal counts for distinct values (1000 values, 10 bins → 100 each)', () => {
    const rng = mulberry32(21);
    const values = Array.from({ length: 1000 }, () => rng() ** 3); // skewed: equal-width bins would not do this
    const bins = quantileBins(values, 10);
    expect(countsOf(bins, 10)).toEqual(new Array<number>(10).fill(100));
    // Order-preserving: a larger value never gets a lower bin.
    const order = values.map((v, i) => [v, bins[i] as number] as const).sort((a, b) => a[0] - b[0]);
    for (let i = 1; i < order.length; i++) expect((order[i] as readonly [number, number])[1]).toBeGreaterThanOrEqual((order[i - 1] as readonly [number, number])[1]);
  });

  it('keeps counts within one of each other when n is not a multiple of the bins', () => {
    const counts = countsOf(quantileBins(Array.from({ length: 10 }, (_, i) => i), 3), 3);
    expect(counts).toEqual([4, 3, 3]);
  });

  it('puts tied values in one bin, so counts differ by at most the largest tie group', () => {
    const rng = mulberry32(4);
    const values = Array.from({ length: 997 }, () => Math.floor(rng() * 40)); // ~25 copies of each of 40 values
    const bins = quantileBins(values, 8);
    const binOfValue = new Map<number, number>();
    for (let i = 0; i < values.length; i++) {
      const v = values[i] as number;
      const b = bins[i] as number;
      const seen = binOfValue.get(v);
      if (seen === undefined) binOfValue.set(v, b);
      else expect(b).toBe(seen);
    }
    const tieMax = Math.max(...Array.from(new Set(values), (v) => values.filter((x) => x === v).length));
    for (const c of countsOf(bins, 8)) expect(Math.abs(c - 997 / 8)).toBeLessThanOrEqual(tieMax);
  });
});
