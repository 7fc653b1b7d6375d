/**
 * The activation probe's latest values per layer for `tidemark show`. The probe runs only in some
 * windows, so each layer's values come from the last step where it ran, not from the run's last step.
 */
import { readProbeConfig } from '../protocol/probe-config.js';
import { toAsyncStore, type AnyStore } from '../storage/async-store.js';
import type { RunDetail } from '../storage/store.js';
import { fmt, printable, table } from './format.js';

export const PROBE_METRICS = [
  'mi_input',
  'mi_label',
  'mi_saturated',
  'mi_input_lower',
  'mi_input_upper',
  'mi_label_pairwise',
  'mi_bounds_saturated',
  'mi_noise_variance',
  'mi_label_linear',
  'linear_accuracy',
  'act_mean',
  'act_std',
  'act_saturation',
  'probe_rows',
] as const;

export type ProbeMetric = (typeof PROBE_METRICS)[number];

export interface ProbeLayerLatest {
  layer: string;
  /** Step of the last window in which the probe ran for this layer. */
  step: number;
  /** Stored values at that step under their metric names; null when absent (e.g. act_saturation of an unbounded activation). */
  values: Record<ProbeMetric, number | null>;
}

/** The estimators and their settings, read from the run's config.probe; null where the config does not say. */
export interface ProbeSettings {
  estimator: string | null;
  bins: number | null;
  rows: number | null;
  every: number | string | null;
  /** Share of training time the probe may take, when every is 'auto'. */
  budget: number | null;
  /** noise_ratio: σ² as a share of each layer's spread; noise_variance: one absolute σ² (runs before the ratio, or asked for). */
  bounds: { estimator: string | null; noise_ratio: number | null; noise_variance: number | null; rows: number | null } | null;
  /** The linear read-out's lower bound on I(T;Y); null when off or not recorded. */
  linear: { estimator: string | null; rows: number | null; folds: number | null } | null;
}

export interface ProbeLatest {
  settings: ProbeSettings;
  layers: ProbeLayerLatest[];
  saturated_note: string;
  bounds_saturated_note: string;
  caution: string;
}

export const SATURATED_MARK = '*';
export const BOUNDS_SATURATED_MARK = '†';
export const SATURATED_NOTE = 'every probe example in its own bin: this value says nothing about the layer';
export const BOUNDS_SATURATED_NOTE = 'every probe example told apart through the added noise: these bounds say nothing about the layer';
export const PROBE_CAUTION =
  'All are estimates that depend on their settings (the noise σ², the bin count, the probe rows) and on the activation function; the linear read-out gives a lower bound on I(T;Y) (with its held-out accuracy), which misses what a linear map cannot reach. Compare them only between runs with the same settings, and confirm any decision on held-out data.';

/** Reads config.probe defensively: stores written by older versions, or imported, may lack parts of it. */
export function probeSettings(config: Record<string, unknown>): ProbeSettings {
  const c = readProbeConfig(config);
  return {
    estimator: c.binned.estimator,
    bins: c.binned.bins,
    rows: c.rows,
    every: c.every,
    budget: c.budget,
    bounds: c.bounds === null ? null : { estimator: c.bounds.estimator, noise_ratio: c.bounds.noiseRatio, noise_variance: c.bounds.noiseVariance, rows: c.bounds.rows },
    linear: c.linear,
  };
}

/** Each probed layer's values at its last probe step, in the model's layer order; null when the run has no probe values. */
export async function latestProbe(anyStore: AnyStore, run: RunDetail): Promise<ProbeLatest | null> {
  const store = toAsyncStore(anyStore);
  // One seriesKeys call tells which layers were probed, so runs without a probe cost no further queries.
  const probed = new Set((await store.seriesKeys(run.id)).filter((k) => k.scope === 'layer' && k.metric === 'mi_input').map((k) => k.layer));
  if (probed.size === 0) return null;
  const layers: ProbeLayerLatest[] = [];
  for (const { name } of run.layers) {
    if (!probed.has(name)) continue;
    // mi_input is written at every probe step, so its last point is the layer's latest probe window.
    const last = (await store.series(run.id, 'mi_input', { layer: name })).at(-1);
    if (last === undefined) continue;
    const values = {} as Record<ProbeMetric, number | null>;
    for (const m of PROBE_METRICS) {
      const pts = m === 'mi_input' ? [last] : await store.series(run.id, m, { layer: name, from: last.step, to: last.step });
      values[m] = pts.length > 0 ? pts[pts.length - 1]!.value : null;
    }
    layers.push({ layer: name, step: last.step, values });
  }
  if (layers.length === 0) return null;
  return {
    settings: probeSettings(run.config),
    layers,
    saturated_note: SATURATED_NOTE,
    bounds_saturated_note: BOUNDS_SATURATED_NOTE,
    caution: PROBE_CAUTION,
  };
}

function settingsLine(s: ProbeSettings): string {
  const parts = [`${s.estimator ?? 'binned'}, ${s.bins ?? '?'} bins per unit, ${s.rows ?? '?'} rows`];
  if (s.bounds !== null) {
    const noise = s.bounds.noise_ratio !== null ? `σ² ${s.bounds.noise_ratio} × each layer's spread` : `σ² ${s.bounds.noise_variance ?? '?'}`;
    parts.push(`bounds ${s.bounds.estimator ?? 'pairwise'}, ${noise}, ${s.bounds.rows ?? '?'} rows`);
  }
  if (s.linear !== null) parts.push(`I(T;Y) ≥ ${s.linear.estimator ?? 'linear read-out'}, ${s.linear.rows ?? '?'} rows in ${s.linear.folds ?? '?'} folds`);
  if (typeof s.every === 'number') parts.push(`every ${s.every} window${s.every === 1 ? '' : 's'}`);
  else if (s.every !== null) parts.push(`every: ${printable(s.every, 20)}${s.budget !== null ? ` (at most ${fmt(100 * s.budget, 1)}% of training time)` : ''}`);
  return parts.join('; ');
}

/** A value with a mark after it when it says nothing; unmarked values get a space so the digits stay aligned. */
function marked(text: string, flag: number | null, mark: string): string {
  return `${text}${flag === 1 ? mark : ' '}`;
}

/** The probe section of `tidemark show`, as lines. */
export function renderProbe(p: ProbeLatest): string[] {
  // The noise-regularised values first: they stay informative on wide layers, where the binned ones sit at log2(rows).
  const rows = [['layer', 'probe step', 'noisy I(X;T) bounds', 'noisy I(T;Y)', 'noise σ²', 'I(T;Y) ≥ linear', 'its accuracy', 'binned I(X;T)', 'binned I(T;Y)', 'at limit', 'rows']];
  let sat = false;
  let boundsSat = false;
  for (const { layer, step, values: v } of p.layers) {
    sat ||= v.mi_saturated === 1;
    boundsSat ||= v.mi_bounds_saturated === 1;
    const bounds = v.mi_input_lower === null || v.mi_input_upper === null ? '—' : `${fmt(v.mi_input_lower)}–${fmt(v.mi_input_upper)}`;
    rows.push([
      printable(layer, 40),
      String(step),
      marked(bounds, v.mi_bounds_saturated, BOUNDS_SATURATED_MARK),
      v.mi_label_pairwise === null ? '—' : marked(fmt(v.mi_label_pairwise), v.mi_bounds_saturated, BOUNDS_SATURATED_MARK),
      v.mi_noise_variance === null ? '—' : v.mi_noise_variance.toPrecision(3),
      v.mi_label_linear === null ? '—' : fmt(v.mi_label_linear),
      v.linear_accuracy === null ? '—' : `${(100 * v.linear_accuracy).toFixed(1)}%`,
      marked(fmt(v.mi_input), v.mi_saturated, SATURATED_MARK),
      marked(fmt(v.mi_label), v.mi_saturated, SATURATED_MARK),
      // A percentage, as the demo prints it: the share of activations pinned near the ends of their range.
      v.act_saturation === null ? '—' : `${(100 * v.act_saturation).toFixed(1)}%`,
      v.probe_rows === null ? '—' : String(v.probe_rows),
    ]);
  }
  const out = [`  probe    ${settingsLine(p.settings)}`, table(rows, '  ')];
  if (sat) out.push(`  ${SATURATED_MARK} ${SATURATED_NOTE}`);
  if (boundsSat) out.push(`  ${BOUNDS_SATURATED_MARK} ${BOUNDS_SATURATED_NOTE}`);
  out.push(`  ${PROBE_CAUTION}`);
  return out;
}
