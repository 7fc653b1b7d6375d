/**
 * The page's data handling, free of the DOM so it can be tested in Node: decoding the protocol's
 * non-finite numbers, filtering the runs list, turning windows into chart columns, the route in the URL
 * fragment and the stop advice sentence.
 */
import type { RunSummary } from '../protocol/messages.js';
import type { Marker, WindowRecord } from '../protocol/records.js';

/** Shown next to every verdict: the numbers are estimates and a stop decision needs held-out data. */
export const CAUTION =
  'These numbers are statistical estimates from minibatches, not guarantees about the model; confirm any decision to stop training on held-out data.';

const NON_FINITE: Record<string, number> = { NaN: Number.NaN, Infinity: Infinity, '-Infinity': -Infinity };

/** JSON.parse that turns the protocol's "NaN", "Infinity" and "-Infinity" strings back into numbers. */
export function decodeJson(text: string): unknown {
  return JSON.parse(text, (_key, value: unknown) => (typeof value === 'string' && value in NON_FINITE ? NON_FINITE[value] : value));
}

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

export type Route = { view: 'runs' } | { view: 'run'; id: string };

/** `#/run/<id>` opens a run; anything else is the list. A token in the fragment (`#/…?token=T`) is ignored here. */
export function parseRoute(hash: string): Route {
  const path = hash.replace(/^#/, '').split('?')[0] ?? '';
  const m = /^\/run\/(.+)$/.exec(path);
  if (m?.[1] !== undefined) {
    let id = m[1];
    try {
      id = decodeURIComponent(id);
    } catch {
      // A malformed escape: keep the raw text, the server will say it matches no run.
    }
    return { view: 'run', id };
  }
  return { view: 'runs' };
}

export function runHash(id: string): string {
  return `#/run/${encodeURIComponent(id)}`;
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
  const at = a.step === null ? ' (no advice recorded yet)' : ` (since step ${a.step})`;
  return `${head}${at}.${a.reason === null ? '' : ` Reason: ${a.reason}.`}`;
}

/** Short text for a marker's details: scalar values only, numbers rounded. */
export function detailsText(details: Record<string, unknown>): string {
  return Object.entries(details)
    .filter(([, v]) => v === null || ['string', 'number', 'boolean'].includes(typeof v))
    .map(([k, v]) => `${k}: ${typeof v === 'number' ? formatNumber(v) : String(v)}`)
    .join(', ');
}

export function formatNumber(v: number): string {
  if (!Number.isFinite(v)) return String(v);
  if (Number.isInteger(v)) return String(v);
  return Math.abs(v) >= 100 || Math.abs(v) < 0.01 ? v.toPrecision(3) : v.toFixed(2);
}
