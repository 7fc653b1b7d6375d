import { describe, expect, it } from 'vitest';
import { binaryEntropy, countEntropy, entropyFromCounts, LN2, millerMadowBits } from '../../src/analysis/entropy.js';

// Sources:
//  - T. M. Cover & J. A. Thomas, Elements of Information Theory, 2nd ed., Wiley 2006: H ≤ log k with equality
//    iff uniform (Ch. 2, Thm 2.6.4 — theorem number from memory); binary entropy and the BSC capacity
//    1 − H_b(p) (§7.1.4, section number from memory). Values: methods.md §6.3 [computed].
//  - G. A. Miller 1955, "Note on the bias of information estimates" (details from memory; discussed in
//    L. Paninski 2003, Neural Computation 15:1191–1253): Ĥ_MM = Ĥ + (m̂ − 1)/(2N) nats. Values: methods.md §6.3
//    [computed].

describe('entropy of a uniform variable (Cover & Thomas Ch. 2; methods.md §6.3)', () => {
  it('is log2 k bits for k = 2, 4, 8, 4096 and 10 outcomes', () => {
    const cases: Array<[number, number]> = [
      [2, 1],
      [4, 2],
      [8, 3],
      [4096, 12],
      [10, 3.321928],
    ];
    for (const [k, bits] of cases) {
      // Any common count gives the same distribution; 7 per outcome keeps N from being a power of two.
      expect(entropyFromCounts(new Array<number>(k).fill(7))).toBeCloseTo(bits, 6);
    }
    // methods.md §6.3: k = 10 is 2.302585 nats.
    expect(entropyFromCounts(new Array<number>(10).fill(1)) * LN2).toBeCloseTo(2.302585, 6);
  });

  it('ignores empty bins and is 0 for a single occupied bin or no data', () => {
    expect(countEntropy([0, 4, 0, 4])).toEqual({ bits: 1, total: 8, occupied: 2 });
    expect(countEntropy([0, 5, 0]).bits).toBe(0);
    expect(countEntropy([]).bits).toBe(0);
  });
});

describe('binary entropy and the binary symmetric channel (Cover & Thomas §7.1.4; methods.md §6.3)', () => {
  it('gives 1 − H_b(p) = 1, 0.919207, 0.531004, 0.500084, 0.188722, 0 bits at p = 0 … 0.5', () => {
    const table: Array<[number, number]> = [
      [0, 1],
      [0.01, 0.919207],
      [0.1, 0.531004],
      [0.11, 0.500084],
      [0.25, 0.188722],
      [0.5, 0],
    ];
    for (const [p, capacity] of table) expect(1 - binaryEntropy(p)).toBeCloseTo(capacity, 6);
  });

  it('is symmetric, 0 at the ends and NaN outside [0, 1]', () => {
    expect(binaryEntropy(0.3)).toBeCloseTo(binaryEntropy(0.7), 15);
    expect(binaryEntropy(1)).toBe(0);
    expect(binaryEntropy(-0.1)).toBeNaN();
    expect(binaryEntropy(Number.NaN)).toBeNaN();
  });
});

describe('Miller–Madow correction (Miller 1955; methods.md §6.3)', () => {
  it('turns counts (5,3,2,0) from 1.485475 bits plug-in into 1.629745 bits', () => {
    const e = countEntropy([5, 3, 2, 0]);
    expect(e.bits).toBeCloseTo(1.485475, 6);
    expect(e.bits * LN2).toBeCloseTo(1.029653, 6);
    expect(e.occupied).toBe(3);
    expect(entropyFromCounts([5, 3, 2, 0], { millerMadow: true })).toBeCloseTo(1.629745, 6);
    expect(entropyFromCounts([5, 3, 2, 0], { millerMadow: true }) * LN2).toBeCloseTo(1.129653, 6);
  });

  it('turns 8 singletons from 3 bits into 3.631179 bits, above log2 N: not clamped', () => {
    const ones = new Array<number>(8).fill(1);
    expect(entropyFromCounts(ones)).toBeCloseTo(3, 12);
    expect(entropyFromCounts(ones, { millerMadow: true })).toBeCloseTo(3.631179, 6);
    expect(entropyFromCounts(ones, { millerMadow: true }) * LN2).toBeCloseTo(2.516942, 6);
  });

  it('adds nothing for one occupied bin or no data', () => {
    expect(millerMadowBits(1, 10)).toBe(0);
    expect(millerMadowBits(0, 0)).toBe(0);
  });
});
