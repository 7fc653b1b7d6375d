/** Pure functions over numbers: no tfjs, no I/O. Re-exported as `analysis` from the package. */
export * from './moments.js';
export * from './decibel.js';
export * from './gradient-stats.js';
export * from './fixed-weight-noise.js';
export * from './batch-size-advice.js';
export * from './power-law.js';
export { studentTCdf, regularizedBeta } from './student-t.js';
export * from './travel-exponent.js';
export * from './lttb.js';
export * from './cusum.js';
export * from './phase-detector.js';
export * from './stop-advice.js';
export * from './entropy.js';
export * from './binned-information.js';
export * from './pairwise-information.js';
export * from './label-bins.js';
export * from './random.js';
export * from './compression-detector.js';
