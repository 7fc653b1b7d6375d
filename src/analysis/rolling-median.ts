/**
 * The median of the last `capacity` values, updated in O(capacity) per value: a ring in arrival order
 * and the same values kept sorted (insertion sort), which for the short windows of the detectors is
 * faster than a heap pair and needs no allocation.
 */
export class RollingMedian {
  readonly capacity: number;
  private readonly ring: Float64Array;
  private readonly sorted: Float64Array;
  private count = 0;

  constructor(capacity: number) {
    if (!Number.isInteger(capacity) || capacity < 1) throw new RangeError(`RollingMedian needs a capacity ≥ 1; got ${capacity}`);
    this.capacity = capacity;
    this.ring = new Float64Array(capacity);
    this.sorted = new Float64Array(capacity + 1);
  }

  /** Values pushed so far (not capped). */
  get pushed(): number {
    return this.count;
  }

  /** Values in the window: min(pushed, capacity). */
  get size(): number {
    return Math.min(this.count, this.capacity);
  }

  push(v: number): void {
    const have = this.size;
    const slot = this.count % this.capacity;
    const full = this.count >= this.capacity;
    if (full) removeSorted(this.sorted, have, this.ring[slot]!);
    insertSorted(this.sorted, full ? have - 1 : have, v);
    this.ring[slot] = v;
    this.count++;
  }

  /** Median of the window; NaN when empty. */
  median(): number {
    return sortedMedian(this.sorted, this.size);
  }

  /** The k-th most recent value in the window (0: the last one pushed). */
  recent(k: number): number {
    return this.ring[(this.count - 1 - k) % this.capacity]!;
  }
}

/** Median of the sorted first n entries of a; NaN when n is 0. */
export function sortedMedian(a: ArrayLike<number>, n: number): number {
  if (n === 0) return Number.NaN;
  const h = n >> 1;
  return n % 2 === 1 ? a[h]! : (a[h - 1]! + a[h]!) / 2;
}

/** Inserts v into the sorted first n entries of a (which has room for n + 1). */
function insertSorted(a: Float64Array, n: number, v: number): void {
  let j = n - 1;
  while (j >= 0 && a[j]! > v) {
    a[j + 1] = a[j]!;
    j--;
  }
  a[j + 1] = v;
}

/** Removes one entry equal to v from the sorted first n entries of a. */
function removeSorted(a: Float64Array, n: number, v: number): void {
  let j = 0;
  while (j < n - 1 && a[j] !== v) j++;
  for (; j < n - 1; j++) a[j] = a[j + 1]!;
}
