/**
 * The fold on a worker thread gives the kernel's numbers bit for bit, and a fold the worker has not
 * picked up runs on the calling thread instead of waiting for it.
 */
import { describe, expect, it } from 'vitest';
import { SimdFold } from '../../src/analysis/simd-fold.js';
import { FoldThread } from '../../src/callback/fold-thread.js';
import { gaussian, mulberry32 } from '../helpers/random.js';

const SIZES = [37, 64, 5];

function fillSet(fold: SimdFold, set: number, seed: number): void {
  const rng = mulberry32(seed);
  for (const v of fold.vectors) for (const slot of v.sets[set]!) for (let j = 0; j < slot.length; j++) slot[j] = 1 + gaussian(rng);
}

async function until(done: () => boolean, ms = 10_000): Promise<void> {
  const start = Date.now();
  while (!done()) {
    if (Date.now() - start > ms) throw new Error('timed out');
    await new Promise((r) => setTimeout(r, 5));
  }
}

describe('FoldThread', () => {
  it('folds on the worker exactly what the kernel folds on this thread', async () => {
    const shared = SimdFold.create(SIZES, { sets: 2, shared: true })!;
    const plain = SimdFold.create(SIZES, { sets: 2 })!;
    const thread = FoldThread.start(shared)!;
    expect(thread).not.toBeNull();
    expect(await thread.ready).toBe(true);
    for (const [blk, set] of [[0, 0], [1, 1], [2, 0]] as const) {
      fillSet(shared, set, 50 + blk);
      fillSet(plain, set, 50 + blk);
      thread.request(set, 1);
      // Let the worker take it (state word DONE = 3) before asking for the result.
      await until(() => Atomics.load(shared.control, 0) === 3);
      thread.finish();
      const want = plain.foldAll(1, set);
      expect(Array.from(shared.results)).toEqual(Array.from(want));
    }
    expect(thread.folds).toMatchObject({ thread: 3, here: 0, waits: 0 });
    SIZES.forEach((_, i) => expect(Array.from(shared.vectors[i]!.s1)).toEqual(Array.from(plain.vectors[i]!.s1)));
    thread.close();
  });

  it('runs a fold here when the worker has not picked it up, and after close', () => {
    const shared = SimdFold.create(SIZES, { sets: 2, shared: true })!;
    const plain = SimdFold.create(SIZES, { sets: 2 })!;
    // A worker takes milliseconds to start; this request is finished before it can.
    const thread = FoldThread.start(shared)!;
    fillSet(shared, 0, 9);
    fillSet(plain, 0, 9);
    thread.request(0, 1);
    thread.finish();
    expect(Array.from(shared.results)).toEqual(Array.from(plain.foldAll(1, 0)));
    thread.close();
    thread.request(0, -1);
    thread.finish();
    plain.foldAll(-1, 0);
    expect(thread.folds).toMatchObject({ thread: 0, here: 2, waits: 0 });
    SIZES.forEach((_, i) => expect(Array.from(shared.vectors[i]!.s1)).toEqual(Array.from(plain.vectors[i]!.s1)));
    expect(() => {
      thread.request(0, 1);
      thread.request(0, 1);
    }).not.toThrow(); // closed: each request folds at once, none is in flight
  });

  it('says, with a code, when the worker fails on a block, and folds on the calling thread from then on', async () => {
    const shared = SimdFold.create(SIZES, { sets: 2, shared: true })!;
    // Arguments that point past the end of the memory: the worker's kernel call traps.
    const valid = shared.calls;
    const calls = valid.map((c) => [...c.slice(0, 8), shared.memory.buffer.byteLength + 64] as const);
    Object.defineProperty(shared, 'calls', { value: calls, configurable: true });
    const thread = FoldThread.start(shared)!;
    expect(await thread.ready).toBe(true);
    thread.request(0, 1);
    await until(() => Atomics.load(shared.control, 0) === 5);
    expect(() => thread.finish()).toThrow(expect.objectContaining({ code: 'TIDEMARK_ERR_STATISTIC', message: expect.stringMatching(/failed on a block/) }));
    Object.defineProperty(shared, 'calls', { value: valid });
    thread.request(1, 1); // closed: runs here
    thread.finish();
    expect(thread.folds).toMatchObject({ thread: 0, here: 1 });
  });

  it('refuses a second request while one is in flight', () => {
    const shared = SimdFold.create(SIZES, { sets: 2, shared: true })!;
    const thread = FoldThread.start(shared)!;
    thread.request(0, 1);
    expect(() => thread.request(1, 1)).toThrow(/in flight/);
    thread.finish();
    thread.close();
  });
});
