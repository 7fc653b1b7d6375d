/**
 * The page's data handling, free of the DOM so it can be tested in Node: decoding the protocol's
 * non-finite numbers, filtering the runs list, turning windows into chart columns, the route in the URL
 * fragment and the stop advice sentence.
 */
import { batchSizeAdvice, noiseReading } from '../analysis/batch-size-advice.js';
import { displacementLevelDb } from '../analysis/phase-detector.js';
import { decodeJson } from '../protocol/json-codec.js';
import { readProbeConfig } from '../protocol/probe-config.js';
import type { RunSummary } from '../protocol/messages.js';
import type { LayerStats, Marker, WindowRecord } from '../protocol/records.js';
import { groupRouteOf, type GroupRoute } from './group-model.js';

/** Shown next to every verdict: the numbers are estimates and a stop decision needs held-out data. */
export const CAUTION =
  'These numbers are statistical estimates from minibatches, not guarantees about the model; confirm any decision to stop training on held-out data.';

export { decodeJson };

/** A run in the list: the live summary, plus whatever else the HTTP list sent. */
export type RunRowView = RunSummary & { heartbeat_at?: number | null };

/** Does the run match every word of the search box (name, group, or a tag as key, value or key=value)? */
export function runMatches(run: RunSummary, query: string): boolean {
  const words = query.toLowerCase().split(/\s+/).filter((w) => w.length > 0);
  if (words.length === 0) return true;
  const hay = [run.name, run.group ?? '', run.id, ...Object.entries(run.tags).flatMap(([k, v]) => [k, v, `${k}=${v}`])].map((s) => s.toLowerCase());
  return words.every((w) => hay.some((h) => h.includes(w)));
}

/** Adds or replaces rows by id; newest first. */
export function mergeRuns(current: readonly RunRowView[], incoming: readonly RunSummary[]): RunRowView[] {
  const byId = new Map(current.map((r) => [r.id, r]));
  for (const r of incoming) byId.set(r.id, { ...byId.get(r.id), ...r });
  return [...byId.values()].sort((a, b) => b.created_at - a.created_at || a.id.localeCompare(b.id));
}

/** A step range shown on the charts. */
export interface StepRange {
  min: number;
  max: number;
}

export type Route =
  | { view: 'runs' }
  | { view: 'run'; id: string; range: StepRange | null }
  | { view: 'compare'; ids: string[]; range: StepRange | null }
  | { view: 'group'; group: GroupRoute };

/** The compare view overlays this many runs at least and at most. */
export const COMPARE_MIN = 2;
export const COMPARE_MAX = 6;

function decodePart(text: string): string {
  try {
    return decodeURIComponent(text);
  } catch {
    // A malformed escape: keep the raw text, the server will say it matches no run.
    return text;
  }
}

/** The fragment's own query (`#/run/x?steps=8-800&token=T`). */
function fragmentQuery(hash: string): URLSearchParams {
  const h = hash.replace(/^#/, '');
  const i = h.indexOf('?');
  return new URLSearchParams(i >= 0 ? h.slice(i + 1) : '');
}

/** `steps=A-B` (0 < A < B): the zoomed step range of the view. */
function rangeOf(hash: string): StepRange | null {
  const m = /^(\d+(?:\.\d+)?)-(\d+(?:\.\d+)?)$/.exec(fragmentQuery(hash).get('steps') ?? '');
  if (m === null) return null;
  const min = Number(m[1]);
  const max = Number(m[2]);
  return min > 0 && max > min ? { min, max } : null;
}

/**
 * `#/run/<id>` opens a run, `#/compare/<id>,<id>,…` overlays runs (ids escaped, so a comma in one stays
 * apart from the separators; repeats dropped); anything else is the list. `?steps=A-B` in the fragment is the
 * zoomed step range; a token there (`?token=T`) is read by tokenFrom. `#/group/<name>` reads a group
 * (group-model.ts has its query).
 */
export function parseRoute(hash: string): Route {
  const path = hash.replace(/^#/, '').split('?')[0] ?? '';
  const run = /^\/run\/(.+)$/.exec(path);
  if (run?.[1] !== undefined) return { view: 'run', id: decodePart(run[1]), range: rangeOf(hash) };
  const cmp = /^\/compare\/(.+)$/.exec(path);
  if (cmp?.[1] !== undefined) {
    const ids = [...new Set(cmp[1].split(',').filter((p) => p.length > 0).map(decodePart))];
    return { view: 'compare', ids, range: rangeOf(hash) };
  }
  const group = /^\/group\/(.+)$/.exec(path);
  if (group?.[1] !== undefined) return { view: 'group', group: groupRouteOf(decodePart(group[1]), fragmentQuery(hash)) };
  return { view: 'runs' };
}

/** The fragment with one key of its query set (or removed, for null); the rest of its query stays. */
function withQuery(hash: string, key: string, value: string | null): string {
  const h = hash.replace(/^#/, '');
  const i = h.indexOf('?');
  const path = i >= 0 ? h.slice(0, i) : h;
  const q = fragmentQuery(hash);
  if (value === null) q.delete(key);
  else q.set(key, value);
  const rest = q.toString().replace(/%2C/gi, ',');
  return `#${path}${rest === '' ? '' : `?${rest}`}`;
}

/** The fragment with its step range replaced (or removed, for null); the rest of its query stays. */
export function withRange(hash: string, range: StepRange | null): string {
  return withQuery(hash, 'steps', range === null ? null : `${Math.round(range.min)}-${Math.round(range.max)}`);
}

export function runHash(id: string): string {
  return `#/run/${encodeURIComponent(id)}`;
}

export function compareHash(ids: readonly string[]): string {
  return `#/compare/${ids.map(encodeURIComponent).join(',')}`;
}

/** The token from `?token=` in the query, or in the fragment (`#/run/x?token=T` or `#token=T`). */
export function tokenFrom(search: string, hash: string): string | null {
  const q = new URLSearchParams(search).get('token');
  if (q !== null && q !== '') return q;
  const h = hash.replace(/^#/, '');
  const i = h.indexOf('?');
  const params = new URLSearchParams(i >= 0 ? h.slice(i + 1) : h.includes('=') ? h : '');
  const t = params.get('token');
  return t !== null && t !== '' ? t : null;
}

/** Chart columns: steps, then one SNR (dB) series per layer and the network, then the noise floor (dB). */
export interface SnrColumns {
  labels: string[];
  steps: number[];
  /** One column per label; null where the value is not finite (a gap in the line). */
  series: (number | null)[][];
  /** 20·log10(snr_floor): where pure noise reads. */
  floor: (number | null)[];
}

export const NETWORK_LABEL = '(network)';

const finite = (v: number | undefined): number | null => (v !== undefined && Number.isFinite(v) ? v : null);

/** Windows in step order (duplicates by step dropped), as columns for the SNR chart. Steps ≤ 0 cannot sit on a log axis and are left out. */
export function snrColumns(layerNames: readonly string[], windows: readonly WindowRecord[]): SnrColumns {
  const seen = new Set<number>();
  const sorted = [...windows].filter((w) => w.step > 0 && !seen.has(w.step) && seen.add(w.step)).sort((a, b) => a.step - b.step);
  const labels = [...layerNames, NETWORK_LABEL];
  return {
    labels,
    steps: sorted.map((w) => w.step),
    series: labels.map((l) => sorted.map((w) => finite(l === NETWORK_LABEL ? w.network.grad_snr_db : w.layers[l]?.grad_snr_db))),
    floor: sorted.map((w) => finite(20 * Math.log10(w.snr_floor))),
  };
}

export interface LevelColumns {
  labels: string[];
  steps: number[];
  /** The phase detector's level per label (the displacement ratio, dB); null where a window cannot give one. */
  series: (number | null)[][];
}

/** The level the phase detector follows, per layer and for the network, as analysis/phase-detector.ts computes it. */
export function levelColumns(layerNames: readonly string[], windows: readonly WindowRecord[]): LevelColumns {
  const seen = new Set<number>();
  const sorted = [...windows].filter((w) => w.step > 0 && !seen.has(w.step) && seen.add(w.step)).sort((a, b) => a.step - b.step);
  const labels = [...layerNames, NETWORK_LABEL];
  const level = (w: WindowRecord, s: LayerStats | undefined): number | null => (s === undefined ? null : finite(displacementLevelDb(w, s)));
  return {
    labels,
    steps: sorted.map((w) => w.step),
    series: labels.map((l) => sorted.map((w) => level(w, l === NETWORK_LABEL ? w.network : w.layers[l]))),
  };
}

export interface AdviceView {
  verdict: string;
  reason: string | null;
  step: number | null;
}

/** The latest advice marker (by detected step), or "continue" when there is none. */
export function latestAdvice(markers: readonly Marker[]): AdviceView {
  let last: Marker | null = null;
  for (const m of markers) if (m.kind === 'advice' && (last === null || m.detected_step >= last.detected_step)) last = m;
  if (last === null) return { verdict: 'continue', reason: null, step: null };
  const v = last.details.verdict;
  const r = last.details.reason;
  return { verdict: typeof v === 'string' ? v : 'continue', reason: typeof r === 'string' ? r : null, step: last.detected_step };
}

/** One sentence for the advice line (the caution follows it on the page). */
export function adviceSentence(a: AdviceView): string {
  const head =
    a.verdict === 'stop'
      ? 'Stop advice: the watched numbers suggest training has stopped paying off'
      : a.verdict === 'may-stop'
        ? 'Stop advice: training may be near the point where it stops paying off'
        : 'Stop advice: keep training';
  const at = a.step === null ? ' (no stop advice so far)' : ` (since step ${a.step})`;
  // Reasons are whole sentences that end in their own full stop.
  const reason = a.reason === null ? '' : ` Reason: ${a.reason.trim().replace(/[.\s]+$/, '')}.`;
  return `${head}${at}.${reason}`;
}

/** Short text for a marker's details: scalar values only, numbers rounded. */
export function detailsText(details: Record<string, unknown>): string {
  return Object.entries(details)
    .filter(([, v]) => v === null || ['string', 'number', 'boolean'].includes(typeof v))
    .map(([k, v]) => `${k}: ${typeof v === 'number' ? formatNumber(v) : String(v)}`)
    .join(', ');
}

export function formatNumber(v: number): string {
  if (Number.isNaN(v)) return '—';
  if (!Number.isFinite(v)) return v > 0 ? '∞' : '−∞';
  const a = Math.abs(v);
  // Very large or small values in short scientific form: a diverged run's 1e31 must not fill an axis.
  if (a !== 0 && (a >= 1e6 || a < 1e-3)) return v.toExponential(1);
  if (Number.isInteger(v)) return String(v);
  return a >= 100 ? v.toPrecision(3) : v.toFixed(2);
}

/** The last step with a noise floor when later windows have none (the floor is 0 once a window is an epoch); else null. */
export function floorEnd(steps: readonly number[], floor: readonly (number | null)[]): number | null {
  let last = -1;
  for (let i = 0; i < floor.length; i++) if (floor[i] !== null && floor[i] !== undefined) last = i;
  return last >= 0 && last < floor.length - 1 ? steps[last]! : null;
}

/** Steps to label on the strip's log axis: 1, 2, 5 × powers of ten inside the range, at least 48 px apart. */
export function stripTicks(min: number, max: number, plotWidth: number): number[] {
  if (!(min > 0) || !(max > min) || !(plotWidth > 0)) return [];
  const lmin = Math.log10(min);
  const span = Math.log10(max) - lmin;
  const out: number[] = [];
  let lastX = -Infinity;
  for (let e = Math.floor(lmin); e <= Math.ceil(Math.log10(max)); e++) {
    for (const m of [1, 2, 5]) {
      const s = m * 10 ** e;
      if (s < min || s > max) continue;
      const px = (plotWidth * (Math.log10(s) - lmin)) / span;
      if (px - lastX < 48) continue;
      out.push(s);
      lastX = px;
    }
  }
  return out;
}

// ---------------------------------------------------------------------------------------------
// The further charts of the run view: phase strip, weight travel, loss, noise scale, information plane.

/** Windows with a positive step, one per step, in step order. */
export function orderedWindows(windows: readonly WindowRecord[]): WindowRecord[] {
  const seen = new Set<number>();
  return [...windows].filter((w) => w.step > 0 && !seen.has(w.step) && seen.add(w.step)).sort((a, b) => a.step - b.step);
}

export type PhaseName = 'drift' | 'diffusion' | 'undetermined';

export interface PhaseSegment {
  from: number;
  to: number;
  phase: PhaseName;
}

export interface PhaseRow {
  /** Layer name, or NETWORK_LABEL. */
  label: string;
  segments: PhaseSegment[];
  /** The drift-start / diffusion-start markers of this row, in step order. */
  ticks: { step: number; kind: 'drift-start' | 'diffusion-start'; confidence: number }[];
}

/**
 * One row per layer with the network first: the phase over [start, end], from the row's own
 * `drift-start` / `diffusion-start` markers (a marker with layer null is the network's). Before its first
 * marker a row is undetermined; each marker starts its phase at its (estimated) step.
 */
export function phaseRows(layerNames: readonly string[], markers: readonly Marker[], start: number, end: number): PhaseRow[] {
  const labels = [NETWORK_LABEL, ...layerNames];
  return labels.map((label) => {
    const own = markers
      .filter((m): m is Marker & { kind: 'drift-start' | 'diffusion-start' } => (m.kind === 'drift-start' || m.kind === 'diffusion-start') && (m.layer ?? NETWORK_LABEL) === label)
      .sort((a, b) => a.step - b.step || a.detected_step - b.detected_step);
    const segments: PhaseSegment[] = [];
    let phase: PhaseName = 'undetermined';
    let from = start;
    for (const m of own) {
      const at = Math.min(Math.max(m.step, start), end);
      if (at > from) segments.push({ from, to: at, phase });
      phase = m.kind === 'drift-start' ? 'drift' : 'diffusion';
      from = Math.max(from, at);
    }
    if (end > from || segments.length === 0) segments.push({ from, to: Math.max(from, end), phase });
    return { label, segments, ticks: own.map((m) => ({ step: m.step, kind: m.kind, confidence: m.confidence })) };
  });
}

/** The value when it can sit on a log axis (finite and above 0), else null. */
export const positive = (v: number | null | undefined): number | null => (typeof v === 'number' && Number.isFinite(v) && v > 0 ? v : null);

export interface TravelColumns {
  /** Layers then NETWORK_LABEL. */
  labels: string[];
  steps: number[];
  /** weight_travel per label; null where not positive and finite (a log axis cannot show it). */
  series: (number | null)[][];
  /** Reference lines through the anchor: travel ∝ step (slope 1) and ∝ √step (slope ½). */
  slope1: (number | null)[];
  slopeHalf: (number | null)[];
  anchor: { step: number; travel: number } | null;
  /** The latest non-null travel_exponent per label (null when none yet). */
  exponents: (number | null)[];
}

/**
 * Weight travel columns for a log-log chart. The reference lines pass through the network's travel at the
 * window nearest the geometric middle of the step range, so both stay in view next to the data.
 */
export function travelColumns(layerNames: readonly string[], windows: readonly WindowRecord[]): TravelColumns {
  const ws = orderedWindows(windows);
  const labels = [...layerNames, NETWORK_LABEL];
  const stat = (w: WindowRecord, l: string): LayerStats | undefined => (l === NETWORK_LABEL ? w.network : w.layers[l]);
  const series = labels.map((l) => ws.map((w) => positive(stat(w, l)?.weight_travel)));
  const steps = ws.map((w) => w.step);
  const net = series[series.length - 1]!;
  let anchor: TravelColumns['anchor'] = null;
  if (steps.length > 0) {
    const mid = Math.sqrt(steps[0]! * steps[steps.length - 1]!);
    let best = Infinity;
    steps.forEach((s, i) => {
      const v = net[i];
      const d = Math.abs(Math.log(s / mid));
      if (v !== null && v !== undefined && d < best) {
        best = d;
        anchor = { step: s, travel: v };
      }
    });
  }
  const a = anchor as TravelColumns['anchor'];
  const line = (k: number): (number | null)[] => steps.map((s) => (a === null ? null : a.travel * (s / a.step) ** k));
  const exponents = labels.map((l) => {
    for (let i = ws.length - 1; i >= 0; i--) {
      const e = stat(ws[i]!, l)?.travel_exponent;
      if (typeof e === 'number' && Number.isFinite(e)) return e;
    }
    return null;
  });
  return { labels, steps, series, slope1: line(1), slopeHalf: line(0.5), anchor: a, exponents };
}

export interface LossColumns {
  steps: number[];
  loss: (number | null)[];
  /** val_loss where the window holds one (an epoch ended in it), null elsewhere. */
  valLoss: (number | null)[];
  hasVal: boolean;
}

export function lossColumns(windows: readonly WindowRecord[]): LossColumns {
  const ws = orderedWindows(windows);
  const valLoss = ws.map((w) => finite(w.logs.val_loss));
  return { steps: ws.map((w) => w.step), loss: ws.map((w) => finite(w.logs.loss)), valLoss, hasVal: valLoss.some((v) => v !== null) };
}

export interface NoiseColumns {
  steps: number[];
  /** The network's noise_scale, null where unknown or not positive. */
  noise: (number | null)[];
  /** The window's mean batch size, null where unknown. */
  batch: (number | null)[];
  /** Where a measurement did not resolve the noise scale: its lower bound (NoiseSample.noise_scale_low), else null. */
  low: (number | null)[];
}

export function noiseColumns(windows: readonly WindowRecord[]): NoiseColumns {
  const ws = orderedWindows(windows);
  const readings = ws.map(noiseReading);
  return {
    steps: ws.map((w) => w.step),
    noise: readings.map((r) => r.value),
    batch: ws.map((w) => positive(w.batch_size)),
    low: readings.map((r) => r.low),
  };
}

/** One sentence on what the recent fixed-weight noise scale implies for the batch size (analysis/batch-size-advice.ts). */
export function noiseSentence(cols: NoiseColumns): string {
  const batch = [...cols.batch].reverse().find((b) => b !== null) ?? null;
  const readings = cols.steps.map((step, i) => ({ step, value: cols.noise[i] ?? null, low: cols.low[i] ?? null }));
  return batchSizeAdvice(readings, batch, cols.steps.length === 0 ? null : cols.steps[cols.steps.length - 1]!);
}

// ---------------------------------------------------------------------------------------------
// The information plane: each layer's path over the probe windows, under one estimator at a time.

/**
 * The estimate the plane shows: `pairwise`, the Kolchinsky & Tracey (2017) pairwise-distance estimate of the
 * layer plus Gaussian noise (mi_input_upper across, mi_label_pairwise up); `linear`, the same across and the
 * linear read-out's lower bound on I(T;Y) up (mi_label_linear, Barber & Agakov 2003), which needs no noise; or
 * `binned`, the plug-in estimate of the binned layer (mi_input across, mi_label up), the classic picture.
 */
export type PlaneEstimator = 'pairwise' | 'linear' | 'binned';

/** The order in which the plane falls back when the estimator asked for is not in the run's windows. */
const PLANE_ESTIMATORS: readonly PlaneEstimator[] = ['pairwise', 'linear', 'binned'];

export interface InfoPoint {
  step: number;
  /** I(X;T), bits: mi_input_upper (pairwise) or mi_input (binned). */
  x: number;
  /** I(T;Y), bits: mi_label_pairwise (pairwise), mi_label_linear (linear, a lower bound) or mi_label (binned). */
  y: number;
  /** The estimate says nothing here: mi_bounds_saturated (pairwise) or mi_saturated (binned) is 1. */
  saturated: boolean;
  /** Pairwise and linear: the Bhattacharyya-based lower bound on I(X;T), bits; null for binned or when not stored. */
  lower: number | null;
  /** Pairwise: σ² of the noise added to this layer in this window (mi_noise_variance); null when not stored. */
  noiseVariance: number | null;
  /** Where the step lies between the plane's first and last probe step, from 0 to 1 on a log scale: what the marker's size and shade show. */
  age: number;
}

export interface InfoTrajectory {
  label: string;
  /** Layer index in the run, for its colour. */
  index: number;
  /** In step order: the first is the path's start, the last its end. */
  points: InfoPoint[];
}

/** The values of one estimator in a layer-window, or null when the window does not hold both of its pair. */
function planePair(s: LayerStats | undefined, estimator: PlaneEstimator): Omit<InfoPoint, 'step' | 'age'> | null {
  if (s === undefined) return null;
  if (estimator === 'binned') {
    const x = finite(s.mi_input);
    const y = finite(s.mi_label);
    return x === null || y === null ? null : { x, y, saturated: s.mi_saturated === 1, lower: null, noiseVariance: null };
  }
  const x = finite(s.mi_input_upper);
  const y = finite(estimator === 'linear' ? s.mi_label_linear : s.mi_label_pairwise);
  return x === null || y === null ? null : { x, y, saturated: s.mi_bounds_saturated === 1, lower: finite(s.mi_input_lower), noiseVariance: positive(s.mi_noise_variance) };
}

/**
 * Per layer, one estimator's (I(X;T), I(T;Y)) in step order; layers with no such value are left out, so the
 * list is empty when no probe ran. Every point's `age` is measured on the steps of all layers together, so a
 * step has the same marker in every layer.
 */
export function infoTrajectories(layerNames: readonly string[], windows: readonly WindowRecord[], estimator: PlaneEstimator = 'binned'): InfoTrajectory[] {
  const ws = orderedWindows(windows);
  return trajectoriesOf(layerNames, ws, (layer, j) => planePair(ws[j]!.layers[layerNames[layer]!], estimator));
}

/** The trajectories of `pairOf(layer index, window index)` over the ordered windows `ws`, with their ages. */
function trajectoriesOf(
  layerNames: readonly string[],
  ws: readonly WindowRecord[],
  pairOf: (layer: number, window: number) => Omit<InfoPoint, 'step' | 'age'> | null,
): InfoTrajectory[] {
  const out: InfoTrajectory[] = [];
  layerNames.forEach((label, index) => {
    const points: InfoPoint[] = [];
    ws.forEach((w, j) => {
      const pair = pairOf(index, j);
      if (pair !== null) points.push({ step: w.step, ...pair, age: 0 });
    });
    if (points.length > 0) out.push({ label, index, points });
  });
  const steps = out.flatMap((t) => t.points.map((p) => p.step));
  const lo = Math.log(Math.min(...steps));
  const span = Math.log(Math.max(...steps)) - lo;
  // One probe step in all: it is the start and the end at once, drawn at full size.
  for (const t of out) for (const p of t.points) p.age = span > 0 ? (Math.log(p.step) - lo) / span : 1;
  return out;
}

/** What the run's config.probe says about the plane's estimators; null where it does not say (older or imported runs). */
export interface PlaneSettings {
  /** Equal-width bins per unit of the binned estimate. */
  bins: number | null;
  /** Probe rows (the binned estimate's). */
  rows: number | null;
  /** Bits within which the binned H(T) of log2(rows) counts as saturated. */
  marginBits: number | null;
  /** The pairwise estimate's settings; null when the config records none (the bounds turned off, or a run before them). */
  pairwise: {
    /** One absolute σ² for every layer, when the probe used one. */
    noiseVariance: number | null;
    /** σ² as a share of each layer's spread (the total variance of its activations), when the probe scaled the noise to the layer. */
    relative: number | null;
    /** Rows entering the pairwise estimate: the estimate is at most log2 of it. */
    rows: number | null;
  } | null;
  /** The linear read-out's settings; null when the config records none (turned off, or a run before it). */
  linear: { rows: number | null; folds: number | null } | null;
  /** Label classes (bins of a regression target): I(T;Y) ≤ H(Y) ≤ log2 of it. */
  classes: number | null;
}

/** The plane's part of config.probe (protocol/probe-config.ts reads it). */
export function planeSettings(config: Record<string, unknown>): PlaneSettings {
  const c = readProbeConfig(config);
  return {
    bins: c.binned.bins,
    rows: c.rows,
    marginBits: c.binned.marginBits,
    pairwise: c.bounds === null ? null : { noiseVariance: c.bounds.noiseVariance, relative: c.bounds.noiseRatio, rows: c.bounds.rows },
    linear: c.linear === null ? null : { rows: c.linear.rows, folds: c.linear.folds },
    classes: c.classes,
  };
}

export const NO_PLANE_SETTINGS: PlaneSettings = { bins: null, rows: null, marginBits: null, pairwise: null, linear: null, classes: null };

export interface InfoPlane {
  /** The estimator drawn. */
  estimator: PlaneEstimator;
  /** The one asked for (the URL's); another is drawn when the run's windows do not hold this one. */
  requested: PlaneEstimator;
  /** Whether any probe window of the run holds each estimator's pair. */
  available: Record<PlaneEstimator, boolean>;
  trajectories: InfoTrajectory[];
  /** Layer-windows that hold another estimator but not the one drawn (older windows of a run, say): not drawn. */
  left: number;
  /** Rows the drawn estimate was computed over (at most log2 of it, in bits); null when unknown. */
  rows: number | null;
  /** I(T;Y) is at most log2(classes), bits; null when the number of classes is unknown. */
  labelCeiling: number | null;
}

/**
 * The plane as drawn: the estimator asked for when the run's probe windows hold it, else the first one they
 * hold in the order pairwise, linear, binned (a run recorded before the pairwise estimate, or with the bounds
 * turned off, falls back to binned).
 */
export function infoPlane(layerNames: readonly string[], windows: readonly WindowRecord[], requested: PlaneEstimator = 'pairwise', settings: PlaneSettings = NO_PLANE_SETTINGS): InfoPlane {
  const ws = orderedWindows(windows);
  // One pass: every layer-window's pair under each estimator, kept for the trajectories of the one drawn.
  const pairs = layerNames.map((label) => ws.map((w) => Object.fromEntries(PLANE_ESTIMATORS.map((e) => [e, planePair(w.layers[label], e)])) as Record<PlaneEstimator, Omit<InfoPoint, 'step' | 'age'> | null>));
  const holds: Record<PlaneEstimator, number> = { pairwise: 0, linear: 0, binned: 0 };
  // Per estimator, the layer-windows that hold some other estimator but not this one.
  const missing: Record<PlaneEstimator, number> = { pairwise: 0, linear: 0, binned: 0 };
  let binnedRows: number | null = null;
  pairs.forEach((row, layer) =>
    row.forEach((cell, j) => {
      const any = PLANE_ESTIMATORS.some((e) => cell[e] !== null);
      for (const e of PLANE_ESTIMATORS) {
        if (cell[e] !== null) holds[e]++;
        else if (any) missing[e]++;
      }
      const r = positive(ws[j]!.layers[layerNames[layer]!]?.probe_rows);
      if (cell.binned !== null && r !== null) binnedRows = Math.max(binnedRows ?? 0, r);
    }),
  );
  const available = { pairwise: holds.pairwise > 0, linear: holds.linear > 0, binned: holds.binned > 0 };
  const estimator = available[requested] ? requested : (PLANE_ESTIMATORS.find((e) => available[e]) ?? requested);
  const rows = estimator === 'binned' ? (binnedRows ?? settings.rows) : (settings.pairwise?.rows ?? null);
  return {
    estimator,
    requested,
    available,
    trajectories: trajectoriesOf(layerNames, ws, (layer, j) => pairs[layer]![j]![estimator]),
    // Windows holding only estimators not drawn (e.g. binned values in windows before the pairwise one was recorded).
    left: missing[estimator],
    rows,
    labelCeiling: settings.classes !== null && settings.classes >= 2 ? Math.log2(settings.classes) : null,
  };
}

/** `plane=binned` or `plane=linear` in the fragment's query: the run view's plane shows that estimate; pairwise otherwise. */
export function planeOf(hash: string): PlaneEstimator {
  const asked = fragmentQuery(hash).get('plane');
  return asked === 'binned' || asked === 'linear' ? asked : 'pairwise';
}

/** The fragment with the plane's estimator set (the default, pairwise, leaves no trace); the rest of its query stays. */
export function withPlane(hash: string, estimator: PlaneEstimator): string {
  return withQuery(hash, 'plane', estimator === 'pairwise' ? null : estimator);
}

/** Shown with the plane: what its numbers are and are not. */
export const PLANE_CAUTION =
  'Every estimator gives estimates that depend on its settings (bins, σ², probe rows): read the shape of a path rather than exact values, and compare runs only at the same settings. ' +
  'Whether a layer compresses depends on its activation and need not happen with ReLU (Saxe et al. 2018); confirm any decision on held-out data.';

/** A setting in three significant digits without trailing zeros (σ² 0.0625, a ratio 0.2); very large or small values as formatNumber gives them. */
export function settingText(v: number): string {
  const a = Math.abs(v);
  return Number.isFinite(v) && (a === 0 || (a >= 1e-3 && a < 1e6)) ? String(Number(v.toPrecision(3))) : formatNumber(v);
}

const bitsText = (rows: number): string => `log2 ${formatNumber(rows)} = ${formatNumber(Math.log2(rows))} bits`;

/** The σ² of the pairwise estimate in words: what the windows stored per layer, else the config's absolute value. */
function noiseText(plane: InfoPlane, settings: PlaneSettings): string {
  const stored = plane.trajectories.flatMap((t) => t.points.map((p) => p.noiseVariance)).filter((v): v is number => v !== null);
  const relative = settings.pairwise?.relative ?? null;
  const scale = relative === null ? '' : ` (${settingText(relative)} × the layer's spread, the total variance of its activations)`;
  if (stored.length > 0) {
    const lo = Math.min(...stored);
    const hi = Math.max(...stored);
    return lo === hi ? `σ² = ${settingText(lo)}${scale}` : `σ² = ${settingText(lo)} to ${settingText(hi)} across layers and windows${scale}`;
  }
  const absolute = settings.pairwise?.noiseVariance ?? null;
  if (absolute !== null) return `σ² = ${settingText(absolute)} (one absolute value for every layer)`;
  if (relative !== null) return `σ² = ${settingText(relative)} × the layer's spread (the total variance of its activations)`;
  return 'σ² not recorded';
}

/** One sentence naming the drawn estimator and its settings, after a word on a fallback or on windows left out. */
export function planeSentence(plane: InfoPlane, settings: PlaneSettings): string {
  const parts: string[] = [];
  if (plane.estimator !== plane.requested) {
    const why: Record<PlaneEstimator, string> = {
      pairwise: 'no pairwise estimate (recorded before it, or with the bounds turned off)',
      linear: 'no linear read-out (recorded before it, or with it turned off)',
      binned: 'no binned estimate',
    };
    parts.push(`This run's probe windows hold ${why[plane.requested]}, so the plane shows the ${plane.estimator} one.`);
  }
  const n = plane.rows;
  if (plane.estimator === 'linear') {
    const folds = settings.linear?.folds ?? null;
    const lrows = settings.linear?.rows ?? null;
    parts.push(
      `Up: a lower bound on I(T;Y) from a linear read-out of the layer (Barber–Agakov, a softmax regression scored on ${lrows === null ? 'probe rows' : `${formatNumber(lrows)} probe rows`} it was not fitted to${folds === null ? '' : `, ${folds} folds`}): ` +
        'no noise is added and it cannot saturate, but it misses what a linear map cannot reach. ' +
        `Across: the Kolchinsky–Tracey KL-based estimate of I(X;T) with Gaussian noise ${noiseText(plane, settings)}, capped at ${n === null ? 'log2 of the rows' : bitsText(n)}.`,
    );
  } else if (plane.estimator === 'pairwise') {
    parts.push(
      `Kolchinsky–Tracey pairwise estimate with Gaussian noise ${noiseText(plane, settings)} over ${n === null ? 'the probe rows' : `${formatNumber(n)} probe rows`}; ` +
        `an estimate of a noise-regularised quantity, capped at ${n === null ? 'log2 of the rows' : bitsText(n)}. ` +
        'Across: the KL-based estimate of I(X;T); up: the matching estimate of I(T;Y).',
    );
  } else {
    const bins = settings.bins === null ? 'equal-width bins' : `${settingText(settings.bins)} equal-width bins per unit`;
    const margin = String(settings.marginBits ?? 0.1);
    parts.push(
      `Binned plug-in estimate with ${bins} over ${n === null ? 'the probe rows' : `${formatNumber(n)} probe rows`}, capped at ${n === null ? 'log2 of the rows' : bitsText(n)}; ` +
        `a window is saturated (a hollow grey ring) when H(T) is within ${margin} bit of that cap: every probe example has its own bin and the value says nothing.`,
    );
  }
  if (plane.left > 0) parts.push(`${plane.left} layer-window${plane.left === 1 ? '' : 's'} without this estimate ${plane.left === 1 ? 'is' : 'are'} not drawn.`);
  return parts.join(' ');
}

/** A colour mixed with white: `share` 0 keeps it, 1 gives white. The plane's early points are paler. */
export function tint(hex: string, share: number): string {
  const m = /^#([0-9a-f]{2})([0-9a-f]{2})([0-9a-f]{2})$/i.exec(hex);
  if (m === null) return hex;
  const k = Math.min(Math.max(share, 0), 1);
  return `#${[m[1]!, m[2]!, m[3]!].map((c) => Math.round(parseInt(c, 16) + (255 - parseInt(c, 16)) * k).toString(16).padStart(2, '0')).join('')}`;
}

/** Windows of a run with more added (a live window, a backfill, the detail of a zoomed range): one per step, in step order. */
export function mergeWindows(current: readonly WindowRecord[], incoming: readonly WindowRecord[]): WindowRecord[] {
  if (incoming.length === 0) return current as WindowRecord[];
  const last = current.at(-1);
  // The common live case: one window after the last, appended without a rebuild.
  if (last !== undefined && incoming.length === 1 && incoming[0]!.step > last.step) return [...current, incoming[0]!];
  const byStep = new Map<number, WindowRecord>();
  for (const w of current) byStep.set(w.step, w);
  for (const w of incoming) if (!byStep.has(w.step)) byStep.set(w.step, w);
  return [...byStep.values()].sort((a, b) => a.step - b.step);
}

/** How many of the windows lie in [min, max] (the windows are in step order). */
export function windowsIn(windows: readonly WindowRecord[], min: number, max: number): number {
  const lower = (x: number, strict: boolean): number => {
    let lo = 0;
    let hi = windows.length;
    while (lo < hi) {
      const mid = (lo + hi) >> 1;
      const s = windows[mid]!.step;
      if (s < x || (strict && s === x)) lo = mid + 1;
      else hi = mid;
    }
    return lo;
  };
  return Math.max(0, lower(max, true) - lower(min, false));
}

/**
 * Columns for runs overlaid on one chart, aligned by step: the union of their (positive) steps, and per run
 * its value, null where the value is not finite (a gap in its line), undefined where the run has no window
 * at that step (the chart joins across it, as uPlot does for undefined).
 */
export interface OverlayColumns {
  steps: number[];
  series: (number | null | undefined)[][];
}

export function overlayColumns(runs: readonly (readonly WindowRecord[])[], value: (w: WindowRecord) => number | null | undefined): OverlayColumns {
  const all = new Set<number>();
  const maps = runs.map((ws) => {
    const m = new Map<number, number | null>();
    for (const w of ws) {
      if (!(w.step > 0)) continue;
      all.add(w.step);
      const v = value(w);
      m.set(w.step, typeof v === 'number' && Number.isFinite(v) ? v : null);
    }
    return m;
  });
  const steps = [...all].sort((a, b) => a - b);
  return { steps, series: maps.map((m) => steps.map((s) => m.get(s))) };
}

/** The phase a row is in at its end ('undetermined' before any marker). */
export function currentPhase(row: PhaseRow): PhaseName {
  return row.segments.at(-1)?.phase ?? 'undetermined';
}

/**
 * Labels for compared runs: the name, and where names repeat (a sweep often reuses one), the tags in which
 * those runs differ, or else the start of the id.
 */
export function compareLabels(runs: readonly { id: string; name: string; tags: Record<string, string> }[]): string[] {
  const first = runs.map((r) => {
    const twins = runs.filter((o) => o.name === r.name);
    if (twins.length < 2) return r.name;
    const keys = [...new Set(twins.flatMap((t) => Object.keys(t.tags)))].sort();
    const differing = keys.filter((k) => new Set(twins.map((t) => t.tags[k])).size > 1);
    if (differing.length > 0) return `${r.name} (${differing.map((k) => `${k}=${r.tags[k] ?? '–'}`).join(' ')})`;
    return `${r.name} (${r.id.slice(0, 8)})`;
  });
  // Runs alike in name and in their differing tags still need labels of their own: add the id's start,
  // longer until the labels differ.
  return first.map((label, i) => {
    if (first.filter((l) => l === label).length < 2) return label;
    const same = runs.filter((_, j) => first[j] === label);
    let n = 8;
    while (n < 36 && new Set(same.map((r) => r.id.slice(0, n))).size < same.length) n += 4;
    const id = runs[i]!.id.slice(0, n);
    return label.endsWith(`(${runs[i]!.id.slice(0, 8)})`) ? label.replace(/\([^()]*\)$/, `(${id})`) : `${label} · ${id}`;
  });
}

/** Layer-windows a first load carries at most: about 2,000 windows of a 10-layer model, 10 MB of JSON. */
export const LAYER_WINDOW_BUDGET = 25_000;

/**
 * How many windows to ask for: 2,000 for a narrow model (smooth lines at any screen width), fewer for a wide
 * one, since every window carries every layer (a 50-layer model's 2,000 windows were 38 MB and 2.5 s to read),
 * and a share of that for each of `runs` runs on one page; never under 200.
 */
export function windowBudget(layers: number, runs = 1): number {
  return Math.max(200, Math.min(2000, Math.round(LAYER_WINDOW_BUDGET / (Math.max(layers, 0) + 1) / Math.max(runs, 1))));
}
