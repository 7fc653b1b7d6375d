import { describe, expect, it } from 'vitest';
import { sampleVariance as ssSampleVariance, mean as ssMean } from 'simple-statistics';
import { ShiftedMoments } from '../../src/analysis/moments.js';
import { SimdFold } from '../../src/analysis/simd-fold.js';
import { SIMD_FOLD_BASE64 } from '../../src/analysis/simd-fold-bytes.js';
import { gaussian, mulberry32 } from '../helpers/random.js';
// @ts-expect-error: a plain .mjs script without types
import { compileKernel, kernelModuleSource } from '../../scripts/build-kernel.mjs';

type Four = [Float32Array, Float32Array, Float32Array, Float32Array];

/** Four vectors around a common offset, copied into the arena's slots of vector `i`. */
function fill(fold: SimdFold, i: number, seed: number, offset = 3): Four {
  const rng = mulberry32(seed);
  const { slots } = fold.vectors[i]!;
  for (const s of slots) for (let j = 0; j < s.length; j++) s[j] = offset + gaussian(rng);
  return [...slots] as Four;
}

function plainCopy(block: readonly Float32Array[]): Float32Array[] {
  return block.map((v) => Float32Array.from(v));
}

describe('SimdFold', () => {
  it('holds the bytes the committed .wat compiles to (wabt, the WebAssembly binary toolkit)', async () => {
    const bytes = (await compileKernel()) as Buffer;
    expect(Buffer.from(SIMD_FOLD_BASE64, 'base64').equals(bytes)).toBe(true);
    expect(kernelModuleSource(bytes)).toContain(SIMD_FOLD_BASE64.slice(0, 100));
  });

  it('runs here (Node 20 has WebAssembly SIMD) and lays out aligned, separate views', () => {
    const fold = SimdFold.create([5, 8, 0]);
    expect(fold).not.toBeNull();
    const v = fold!.vectors;
    expect(v.map((x) => x.slots[0].length)).toEqual([5, 8, 0]);
    for (const x of v) for (const view of [...x.slots, x.ref, x.s1]) expect(view.byteOffset % 16).toBe(0);
    v[0]!.slots[3][4] = 7;
    v[1]!.ref[0] = 9;
    expect(v[1]!.slots[0][0]).toBe(0);
    expect(v[0]!.s1[4]).toBe(0);
  });

  // The kernel must give the statistics of the JavaScript loop: s1 coordinate for coordinate (the same
  // operations in the same order per lane), the sums of squares up to the order in which two lanes add.
  it.each([37, 38, 1, 2, 1001])('folds blocks of four of %i coordinates as the JavaScript loop does', (n) => {
    const fold = SimdFold.create([n])!;
    const simd = new ShiftedMoments(n, { ...fold.vectors[0]!, fold });
    const js = new ShiftedMoments(n);
    for (let blk = 0; blk < 3; blk++) {
      const block = fill(fold, 0, 100 + blk);
      expect(js.pushBlock(plainCopy(block))).toBe(true);
      expect(simd.pushBlock(block)).toBe(true);
    }
    expect(simd.count).toBe(12);
    expect(Array.from(simd.mean())).toEqual(Array.from(js.mean()));
    expect(simd.varianceTrace() / js.varianceTrace()).toBeCloseTo(1, 12);
    expect(simd.successiveDiffTrace() / js.successiveDiffTrace()).toBeCloseTo(1, 12);
    expect(simd.meanSquaredNorm() / js.meanSquaredNorm()).toBeCloseTo(1, 12);
  });

  it('agrees with simple-statistics mean and sample variance per coordinate', () => {
    const n = 64;
    const fold = SimdFold.create([n])!;
    const simd = new ShiftedMoments(n, { ...fold.vectors[0]!, fold });
    const kept: Float32Array[] = [];
    for (let blk = 0; blk < 2; blk++) {
      const block = fill(fold, 0, 7 + blk, 1000);
      kept.push(...plainCopy(block));
      expect(simd.pushBlock(block)).toBe(true);
    }
    let trace = 0;
    for (let j = 0; j < n; j++) {
      const col = kept.map((v) => v[j]!);
      trace += ssSampleVariance(col);
      expect(simd.mean()[j]).toBeCloseTo(ssMean(col), 9);
    }
    expect(simd.varianceTrace() / trace).toBeCloseTo(1, 9);
  });

  it.each([
    ['NaN at an even coordinate', 10, Number.NaN],
    ['Infinity at an odd coordinate', 11, Infinity],
    ['−Infinity at the odd last coordinate', 36, -Infinity],
  ])('adds nothing for a block with %s, like the JavaScript loop', (_name, at, bad) => {
    const n = 37;
    const fold = SimdFold.create([n])!;
    const simd = new ShiftedMoments(n, { ...fold.vectors[0]!, fold });
    const js = new ShiftedMoments(n);
    const first = fill(fold, 0, 1);
    js.pushBlock(plainCopy(first));
    simd.pushBlock(first);
    const meanBefore = Array.from(simd.mean());
    const block = fill(fold, 0, 2);
    block[2][at] = bad;
    expect(js.pushBlock(plainCopy(block))).toBe(false);
    expect(simd.pushBlock(block)).toBe(false);
    expect(simd.count).toBe(4);
    const meanAfter = Array.from(simd.mean());
    for (let j = 0; j < n; j++) expect(meanAfter[j]).toBeCloseTo(meanBefore[j]!, 12);
    expect(simd.varianceTrace() / js.varianceTrace()).toBeCloseTo(1, 12);
    expect(simd.successiveDiffTrace() / js.successiveDiffTrace()).toBeCloseTo(1, 12);
  });

  // One call for every vector of the arena (what the wasm accumulator does per block) must give each
  // vector the numbers of its own JavaScript loop, and refuse only the vectors holding a bad value.
  it('folds every vector in one call as each vector\'s JavaScript loop does, and marks only a vector with a bad value', () => {
    const sizes = [37, 1, 0, 64, 6];
    const fold = SimdFold.create(sizes)!;
    const simd = sizes.map((n, i) => new ShiftedMoments(n, { ...fold.vectors[i]!, fold }));
    const js = sizes.map((n) => new ShiftedMoments(n));
    for (let blk = 0; blk < 3; blk++) {
      const blocks = sizes.map((_, i) => fill(fold, i, 10 * blk + i, 2 + i));
      if (blk === 2) blocks[3]![1][17] = Number.NaN;
      sizes.forEach((_, i) => simd[i]!.adoptReference(blocks[i]![0]));
      const out = fold.foldAll(1);
      sizes.forEach((_, i) => {
        const y = out[2 * i]!;
        const q = out[2 * i + 1]!;
        const jsTook = js[i]!.pushBlock(plainCopy(blocks[i]!));
        expect(Number.isFinite(y) && Number.isFinite(q)).toBe(jsTook);
        if (jsTook) simd[i]!.recordBlock(4, y, q);
        else {
          const s1Before = Float64Array.from(fold.vectors[i]!.s1);
          fold.fold4(fold.vectors[i]!.slots, fold.vectors[i]!.ref, fold.vectors[i]!.s1, -1);
          // Taking back restores every coordinate to float64 rounding (the bad one was never touched).
          expect(fold.vectors[i]!.s1[17]).toBe(s1Before[17]);
        }
      });
    }
    sizes.forEach((n, i) => {
      expect(simd[i]!.count).toBe(js[i]!.count);
      if (n === 0) return;
      expect(simd[i]!.count).toBe(i === 3 ? 8 : 12);
      const a = simd[i]!.mean();
      const b = js[i]!.mean();
      for (let j = 0; j < n; j++) expect(a[j]).toBeCloseTo(b[j]!, 12);
      if (n > 1) expect(simd[i]!.varianceTrace() / js[i]!.varianceTrace()).toBeCloseTo(1, 12);
      expect(simd[i]!.successiveDiffTrace() / js[i]!.successiveDiffTrace()).toBeCloseTo(1, 12);
    });
  });

  it('refuses storage that is not in the kernel memory or of the wrong length', () => {
    const fold = SimdFold.create([4])!;
    expect(() => new ShiftedMoments(4, { ref: new Float64Array(4), s1: fold.vectors[0]!.s1, fold })).toThrow(RangeError);
    expect(() => new ShiftedMoments(5, { ...fold.vectors[0]!, fold })).toThrow(RangeError);
  });
});
