/**
 * A small seeded generator for reproducible subsamples: mulberry32, a 32-bit-state generator by
 * Tommy Ettinger (public domain; from memory). Deterministic across runs and platforms.
 */

/** Returns a function yielding uniform numbers in [0, 1) from a 32-bit seed. */
export function mulberry32(seed: number): () => number {
  let a = seed >>> 0;
  return () => {
    a = (a + 0x6d2b79f5) >>> 0;
    let t = a;
    t = Math.imul(t ^ (t >>> 15), t | 1);
    t ^= t + Math.imul(t ^ (t >>> 7), t | 61);
    return ((t ^ (t >>> 14)) >>> 0) / 4294967296;
  };
}

/** `k` of the indices `items`, uniformly without replacement (partial Fisher–Yates), returned sorted. */
export function subsample(items: number[], k: number, seed: number): number[] {
  const rng = mulberry32(seed);
  const a = items.slice();
  for (let i = 0; i < k; i++) {
    const j = i + Math.floor(rng() * (a.length - i));
    const t = a[i] as number;
    a[i] = a[j] as number;
    a[j] = t;
  }
  return a.slice(0, k).sort((x, y) => x - y);
}
