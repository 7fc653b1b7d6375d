/**
 * Deterministic inputs for the benchmarks: a seeded generator and a 4-class data set labelled by a
 * random linear teacher, so the reference model has something to learn and every run sees the same data.
 */

/** xorshift32 (Marsaglia 2003): uniform numbers in [0, 1) from a non-zero 32-bit seed. */
export function xorshift32(seed: number): () => number {
  let s = seed >>> 0 || 0x9e3779b9;
  return () => {
    s ^= s << 13;
    s >>>= 0;
    s ^= s >>> 17;
    s ^= s << 5;
    s >>>= 0;
    return s / 4294967296;
  };
}

/** A standard normal deviate (Box–Muller, cosine branch). */
export function normal(rng: () => number): number {
  let u = rng();
  while (u <= 0) u = rng();
  return Math.sqrt(-2 * Math.log(u)) * Math.cos(2 * Math.PI * rng());
}

export interface TeacherData {
  /** Row-major inputs, `samples × features`. */
  x: Float32Array;
  /** Row-major one-hot labels, `samples × classes`. */
  y: Float32Array;
  samples: number;
  features: number;
  classes: number;
}

/**
 * Gaussian inputs; the label is the argmax of a random linear map of the input plus noise
 * (noise keeps the problem from being perfectly separable, so gradients stay noisy).
 */
export function teacherData(samples: number, features: number, classes: number, seed: number): TeacherData {
  const rng = xorshift32(seed);
  const w = Float64Array.from({ length: features * classes }, () => normal(rng) / Math.sqrt(features));
  const x = new Float32Array(samples * features);
  const y = new Float32Array(samples * classes);
  for (let i = 0; i < samples; i++) {
    for (let j = 0; j < features; j++) x[i * features + j] = normal(rng);
    let best = 0;
    let bestScore = -Infinity;
    for (let c = 0; c < classes; c++) {
      let score = 0.5 * normal(rng);
      for (let j = 0; j < features; j++) score += x[i * features + j]! * w[j * classes + c]!;
      if (score > bestScore) {
        bestScore = score;
        best = c;
      }
    }
    y[i * classes + best] = 1;
  }
  return { x, y, samples, features, classes };
}
