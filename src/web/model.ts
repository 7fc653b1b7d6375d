/**
 * The page's data handling, free of the DOM so it can be tested in Node: decoding the protocol's
 * non-finite numbers, filtering the runs list, turning windows into chart columns, the route in the URL
 * fragment and the stop advice sentence.
 */
import { batchSizeAdvice } from '../analysis/batch-size-advice.js';
import { displacementLevelDb } from '../analysis/phase-detector.js';
import { decodeJson } from '../protocol/json-codec.js';
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

/** The fragment with its step range replaced (or removed, for null); the rest of its query stays. */
export function withRange(hash: string, range: StepRange | null): string {
  const h = hash.replace(/^#/, '');
  const i = h.indexOf('?');
  const path = i >= 0 ? h.slice(0, i) : h;
  const q = fragmentQuery(hash);
  if (range === null) q.delete('steps');
  else q.set('steps', `${Math.round(range.min)}-${Math.round(range.max)}`);
  const rest = q.toString().replace(/%2C/gi, ',');
  return `#${path}${rest === '' ? '' : `?${rest}`}`;
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
}

export function noiseColumns(windows: readonly WindowRecord[]): NoiseColumns {
  const ws = orderedWindows(windows);
  return { steps: ws.map((w) => w.step), noise: ws.map((w) => positive(w.network.noise_scale)), batch: ws.map((w) => positive(w.batch_size)) };
}

/** One sentence on what the recent fixed-weight noise scale implies for the batch size (analysis/batch-size-advice.ts). */
export function noiseSentence(cols: NoiseColumns): string {
  const batch = [...cols.batch].reverse().find((b) => b !== null) ?? null;
  return batchSizeAdvice(cols.noise, batch);
}

export interface InfoPoint {
  step: number;
  /** mi_input, bits. */
  x: number;
  /** mi_label, bits. */
  y: number;
  saturated: boolean;
}

export interface InfoTrajectory {
  label: string;
  /** Layer index in the run, for its colour. */
  index: number;
  points: InfoPoint[];
}

/** Per layer, the probe's (mi_input, mi_label) in step order; layers with no probe value are left out. Empty when no probe ran. */
export function infoTrajectories(layerNames: readonly string[], windows: readonly WindowRecord[]): InfoTrajectory[] {
  const ws = orderedWindows(windows);
  const out: InfoTrajectory[] = [];
  layerNames.forEach((label, index) => {
    const points: InfoPoint[] = [];
    for (const w of ws) {
      const s = w.layers[label];
      const x = finite(s?.mi_input);
      const y = finite(s?.mi_label);
      if (x !== null && y !== null) points.push({ step: w.step, x, y, saturated: s?.mi_saturated === 1 });
    }
    if (points.length > 0) out.push({ label, index, points });
  });
  return out;
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
