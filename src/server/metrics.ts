/**
 * `/metrics`: the latest numbers of running and recently ended runs, and the server's own counters, as
 * OpenMetrics families. Metric names are the stored names with a `tidemark_` prefix; runs and layers are
 * labels (any UTF-8 is fine in a label value), so names never need sanitising.
 */
import type { Marker, Phase } from '../protocol/records.js';
import { toAsyncStore, type AnyStore, type AsyncStore } from '../storage/async-store.js';
import type { RunRow } from '../storage/store.js';
import type { ServerCounters } from './context.js';
import { OPENMETRICS_CONTENT_TYPE, PROMETHEUS_TEXT_CONTENT_TYPE, renderOpenMetrics, renderPrometheusText, type Family, type Sample } from './openmetrics.js';

const LAYER_GAUGES: [metric: string, help: string][] = [
  ['grad_snr_db', 'Gradient signal-to-noise ratio over the latest window, dB (20·log10 of the amplitude ratio).'],
  ['travel_exponent', 'Local log-log slope of weight travel against step at the latest window.'],
];
/** Values measured now and then (noise measurements, probes): the latest one stored, not the latest window's. */
const LATEST_GAUGES: [metric: string, help: string][] = [
  ['noise_scale', 'Gradient noise scale B_simple of the latest measurement at fixed weights (McCandlish et al. 2018), examples; an estimate.'],
  ['mi_input', 'Binned I(X;T) of the latest probe, bits; says nothing when tidemark_mi_saturated is 1.'],
  ['mi_label', 'Binned I(T;Y) of the latest probe, bits; says nothing when tidemark_mi_saturated is 1.'],
  ['mi_saturated', '1 when the latest binned estimate put every probe example in its own cell.'],
];
const PHASES: Phase[] = ['drift', 'diffusion', 'undetermined'];
const VERDICTS = ['continue', 'may-stop', 'stop'] as const;
const NETWORK = '(network)';

export interface MetricsContext {
  now: number;
  recentMs: number;
  counters: ServerCounters;
  viewers: number;
}

async function shownRuns(store: AsyncStore, now: number, recentMs: number): Promise<RunRow[]> {
  return (await store.runs()).filter((r) => r.status === 'running' || (r.ended_at ?? r.heartbeat_at) >= now - recentMs);
}

/** Each layer's current phase from the last phase marker detected for it. */
function phasesOf(markers: readonly Marker[]): Map<string, Phase> {
  const latest = new Map<string, Marker>();
  for (const m of markers) {
    if (m.kind !== 'drift-start' && m.kind !== 'diffusion-start') continue;
    const key = m.layer ?? NETWORK;
    const seen = latest.get(key);
    if (seen === undefined || m.detected_step >= seen.detected_step) latest.set(key, m);
  }
  return new Map([...latest].map(([k, m]) => [k, m.kind === 'drift-start' ? 'drift' : 'diffusion']));
}

function verdictOf(markers: readonly Marker[]): string {
  let last: Marker | null = null;
  for (const m of markers) if (m.kind === 'advice' && (last === null || m.detected_step >= last.detected_step)) last = m;
  const v = last?.details.verdict;
  return typeof v === 'string' ? v : 'continue';
}

export async function metricsFamilies(anyStore: AnyStore, ctx: MetricsContext): Promise<Family[]> {
  const store = toAsyncStore(anyStore);
  const runs = await shownRuns(store, ctx.now, ctx.recentMs);
  const gauges = new Map<string, Sample[]>([...LAYER_GAUGES, ...LATEST_GAUGES].map(([m]) => [m, []]));
  const phase: Sample[] = [];
  const advice: Sample[] = [];
  const step: Sample[] = [];
  for (const r of runs) {
    const base = { run: r.id, run_name: r.name };
    if (r.last_step !== null) step.push({ labels: base, value: r.last_step });
    const detail = await store.resolveRun(r.id);
    const last = r.last_step === null ? undefined : (await store.windows(r.id, { after: r.last_step - 1 })).at(-1);
    if (last !== undefined) {
      for (const [layer, stats] of [...Object.entries(last.layers), [NETWORK, last.network] as const]) {
        for (const [metric] of LAYER_GAUGES) {
          const v = (stats as unknown as Record<string, unknown>)[metric];
          if (typeof v === 'number') gauges.get(metric)!.push({ labels: { ...base, layer }, value: v });
        }
      }
    }
    for (const layer of [NETWORK, ...detail.layers.map((l) => l.name)]) {
      for (const [metric] of LATEST_GAUGES) {
        const p = (await store.series(r.id, metric, { layer: layer === NETWORK ? null : layer, last: 1 }))[0];
        if (p !== undefined) gauges.get(metric)!.push({ labels: { ...base, layer }, value: p.value });
      }
    }
    const markers = await store.markers(r.id);
    const phases = phasesOf(markers);
    for (const layer of [NETWORK, ...detail.layers.map((l) => l.name)]) {
      const current = phases.get(layer) ?? 'undetermined';
      for (const p of PHASES) phase.push({ labels: { ...base, layer, phase: p }, value: p === current ? 1 : 0 });
    }
    const verdict = verdictOf(markers);
    for (const v of VERDICTS) advice.push({ labels: { ...base, verdict: v }, value: v === verdict ? 1 : 0 });
  }
  const families: Family[] = [];
  for (const [metric, help] of [...LAYER_GAUGES, ...LATEST_GAUGES]) {
    families.push({ name: `tidemark_${metric}`, type: 'gauge', help, samples: gauges.get(metric)! });
  }
  families.push(
    { name: 'tidemark_phase', type: 'gauge', help: 'Current phase of each layer and of the network: 1 for the current one (an estimate).', samples: phase },
    { name: 'tidemark_advice', type: 'gauge', help: 'Current stop advice: 1 for the current verdict (an estimate; confirm on held-out data).', samples: advice },
    { name: 'tidemark_last_step', type: 'gauge', help: 'Step of the latest stored window.', samples: step },
    {
      name: 'tidemark_points_ingested',
      type: 'counter',
      help: 'Numeric values stored from remote writers since the server started.',
      samples: [{ value: ctx.counters.pointsIngested }],
    },
    { name: 'tidemark_batches_ingested', type: 'counter', help: 'Batches stored from remote writers (duplicates not counted).', samples: [{ value: ctx.counters.batchesIngested }] },
    { name: 'tidemark_viewers', type: 'gauge', help: 'Live viewers connected.', samples: [{ value: ctx.viewers }] },
    {
      name: 'tidemark_rejected',
      type: 'counter',
      help: 'Requests and messages refused, by error code.',
      samples: [...ctx.counters.rejected].sort(([a], [b]) => a.localeCompare(b)).map(([code, n]) => ({ labels: { code }, value: n })),
    },
  );
  return families;
}

/**
 * OpenMetrics unless the client asks for the older Prometheus text format only (an Accept header naming
 * text/plain and not application/openmetrics-text): a scraper that accepts both gets OpenMetrics.
 */
export async function metricsText(store: AnyStore, ctx: MetricsContext, accept = ''): Promise<{ contentType: string; text: string }> {
  const families = await metricsFamilies(store, ctx);
  if (/text\/plain/i.test(accept) && !/application\/openmetrics-text/i.test(accept)) {
    return { contentType: PROMETHEUS_TEXT_CONTENT_TYPE, text: renderPrometheusText(families) };
  }
  return { contentType: OPENMETRICS_CONTENT_TYPE, text: renderOpenMetrics(families) };
}
