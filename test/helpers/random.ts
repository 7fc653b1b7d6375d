/**
 * Small seeded pseudo-random helpers for tests. Deterministic across runs and platforms.
 *
 * mulberry32 is the library's own (src/analysis/random.ts), re-exported here;
 * gaussian: the Box–Muller transform (Box & Muller 1958, "A note on the generation of random
 * normal deviates", Ann. Math. Statist. 29(2)) [memory].
 */

export { mulberry32 } from '../../src/analysis/random.js';

/** One standard normal draw from two uniforms (Box–Muller; the second deviate is discarded for simplicity). */
export function gaussian(rng: () => number): number {
  let u = rng();
  while (u <= 0) u = rng(); // avoid log(0)
  const v = rng();
  return Math.sqrt(-2 * Math.log(u)) * Math.cos(2 * Math.PI * v);
}

/** Fisher–Yates shuffle in place (Knuth, TAOCP vol. 2, Algorithm 3.4.2P) [memory]. */
export function shuffleInPlace<T>(items: T[], rng: () => number): T[] {
  for (let i = items.length - 1; i > 0; i--) {
    const j = Math.floor(rng() * (i + 1));
    const tmp = items[i] as T;
    items[i] = items[j] as T;
    items[j] = tmp;
  }
  return items;
}
