/**
 * What every Store backend does the same way when it reads: checking query options, turning stored rows
 * back into runs, markers and window records, thinning and downsampling, and the messages of a run that
 * is not found or ambiguous. The backends only fetch rows.
 */
import { lttb } from '../analysis/lttb.js';
import { TidemarkError, TidemarkRangeError, TidemarkTypeError } from '../errors.js';
import { decodeJson } from '../protocol/json-codec.js';
import type { LayerStats, Marker, MarkerKind, RunStatus, VariableStats, WindowRecord } from '../protocol/records.js';
import { unknownOption } from '../option-check.js';
import { isObject, RUN_STATUSES, show } from './record-check.js';
import type { RunFilter, RunRow, SeriesPoint, SeriesQuery, SeriesScope, WindowQuery } from './store.js';

/** Window fields that read as run-level series, served from the windows table. */
export const WINDOW_SERIES = ['snr_floor', 'epoch', 'batch_size'] as const;
export type WindowSeries = (typeof WINDOW_SERIES)[number];
/** Layer and network statistics a record carries as null (not yet estimable) rather than leaving out. */
const NULLABLE_METRICS: ReadonlySet<string> = new Set(['noise_scale', 'travel_exponent']);

export function invalidOption(where: string, name: string, expected: string, got: unknown): TidemarkTypeError {
  return new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `${where}: option '${name}' must be ${expected}; received ${show(got)}.`);
}

function checkKeys(where: string, given: object, known: readonly string[]): void {
  for (const key of Object.keys(given)) if (!known.includes(key)) throw unknownOption(key, known, { owner: where });
}

// ---------------------------------------------------------------------------------------------
// Query options

const FILTER_KEYS = ['name', 'group', 'tags', 'status', 'limit'] as const;

/** A runs() filter, checked; `limit` defaulted. */
export interface CheckedFilter {
  name?: string;
  group?: string;
  tags: [string, string][];
  status?: RunStatus;
  limit: number;
}

export function checkFilter(filter: RunFilter): CheckedFilter {
  if (typeof filter !== 'object' || filter === null) throw invalidOption('runs', 'filter', 'an object', filter);
  checkKeys('runs', filter, FILTER_KEYS);
  const out: CheckedFilter = { tags: [], limit: filter.limit ?? 1000 };
  if (filter.name !== undefined) {
    if (typeof filter.name !== 'string') throw invalidOption('runs', 'name', 'a string', filter.name);
    out.name = filter.name;
  }
  if (filter.group !== undefined) {
    if (typeof filter.group !== 'string') throw invalidOption('runs', 'group', 'a string', filter.group);
    out.group = filter.group;
  }
  if (filter.tags !== undefined) {
    if (!isObject(filter.tags)) throw invalidOption('runs', 'tags', 'an object of strings', filter.tags);
    for (const [k, v] of Object.entries(filter.tags)) {
      if (typeof v !== 'string') throw invalidOption('runs', `tags.${k}`, 'a string', v);
      out.tags.push([k, v]);
    }
  }
  if (filter.status !== undefined) {
    if (!RUN_STATUSES.includes(filter.status)) throw invalidOption('runs', 'status', RUN_STATUSES.join(', '), filter.status);
    out.status = filter.status;
  }
  if (!Number.isInteger(out.limit) || out.limit < 1) throw invalidOption('runs', 'limit', 'a positive integer', out.limit);
  return out;
}

const SERIES_QUERY_KEYS = ['layer', 'from', 'to', 'points', 'last'] as const;

export interface CheckedSeriesQuery {
  layer: string | null;
  from: number;
  to: number;
  points: number | undefined;
  last: number | undefined;
}

export function checkSeriesQuery(metric: unknown, query: SeriesQuery): CheckedSeriesQuery {
  if (typeof metric !== 'string') throw invalidOption('series', 'metric', 'a metric name', metric);
  if (typeof query !== 'object' || query === null) throw invalidOption('series', 'query', 'an object', query);
  checkKeys('series', query, SERIES_QUERY_KEYS);
  const layer = query.layer ?? null;
  if (layer !== null && typeof layer !== 'string') throw invalidOption('series', 'layer', 'a layer or variable name, or null', layer);
  const from = query.from ?? -Infinity;
  const to = query.to ?? Infinity;
  if (typeof from !== 'number' || Number.isNaN(from)) throw invalidOption('series', 'from', 'a step number', from);
  if (typeof to !== 'number' || Number.isNaN(to)) throw invalidOption('series', 'to', 'a step number', to);
  const points = query.points;
  if (points !== undefined && (!Number.isInteger(points) || points < 2)) {
    throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', `series: option 'points' must be an integer of at least 2; received ${show(points)}.`);
  }
  const last = query.last;
  if (last !== undefined && (!Number.isInteger(last) || last < 1)) throw invalidOption('series', 'last', 'an integer ≥ 1', last);
  return { layer, from, to, points, last };
}

export interface CheckedWindowQuery {
  /** Inclusive step bounds. */
  lo: number;
  hi: number;
  /** True when a range was asked for (only part of the run is read). */
  ranged: boolean;
  points: number | null;
  variables: boolean;
}

export function checkWindowQuery(query: WindowQuery): CheckedWindowQuery {
  if (!isObject(query as unknown)) throw invalidOption('windows', 'query', 'an object { after, from, to, points, variables }', query);
  for (const key of ['after', 'from', 'to'] as const) {
    const v = query[key];
    if (v !== undefined && (typeof v !== 'number' || Number.isNaN(v))) throw invalidOption('windows', key, 'a step number', v);
  }
  const after = query.after ?? null;
  const points = query.points ?? null;
  if (points !== null && (!Number.isInteger(points) || points < 2)) throw invalidOption('windows', 'points', 'an integer ≥ 2', points);
  if (query.variables !== undefined && typeof query.variables !== 'boolean') throw invalidOption('windows', 'variables', 'true or false', query.variables);
  // `after` is exclusive and `from` inclusive; both bound from below, so the larger one holds.
  const lo = Math.max(query.from ?? -Infinity, after === null ? -Infinity : nextAbove(after));
  return { lo, hi: query.to ?? Infinity, ranged: after !== null || query.from !== undefined || query.to !== undefined, points, variables: query.variables !== false };
}

export function checkCursor(cursor: unknown): number {
  if (!Number.isSafeInteger(cursor) || (cursor as number) < 0) throw invalidOption('markersSince', 'cursor', 'an integer ≥ 0 (0 for all)', cursor);
  return cursor as number;
}

export function checkPruneBefore(before: unknown): number {
  if (typeof before !== 'number' || Number.isNaN(before)) {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `prune: 'before' must be a time in ms since the epoch; received ${show(before)}.`);
  }
  return before;
}

export function checkRunRef(ref: unknown): string {
  if (typeof ref !== 'string' || ref.length === 0) {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `resolveRun: expected a run id, id prefix or name; received ${show(ref)}.`);
  }
  return ref;
}

export function checkRunId(runId: unknown): string {
  if (typeof runId !== 'string') throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `expected a run id; received ${show(runId)}.`);
  return runId;
}

/** The smallest step greater than `v` (steps are integers). */
function nextAbove(v: number): number {
  return Number.isInteger(v) ? v + 1 : Math.ceil(v);
}

// ---------------------------------------------------------------------------------------------
// Rows back into records

/** A run as a backend reads it: JSON columns still text, status already derived (interrupted when stale). */
export interface RunDbRow {
  id: string;
  name: string;
  group_name: string | null;
  tags: string;
  status: RunStatus;
  created_at: number;
  ended_at: number | null;
  end_step: number | null;
  heartbeat_at: number;
  last_step: number | null;
  window_count: number;
  config: string;
}

export function toRunRow(r: RunDbRow): RunRow {
  return {
    id: r.id,
    name: r.name,
    group: r.group_name,
    tags: decodeJson(r.tags) as Record<string, string>,
    status: r.status,
    created_at: r.created_at,
    ended_at: r.ended_at,
    end_step: r.end_step,
    heartbeat_at: r.heartbeat_at,
    last_step: r.last_step,
    windows: r.window_count,
    config: decodeJson(r.config) as Record<string, unknown>,
  };
}

export interface MarkerDbRow {
  layer: string | null;
  kind: MarkerKind;
  /** null is NaN (SQLite); PostgreSQL gives NaN itself. */
  step: number | null;
  detected_step: number | null;
  confidence: number | null;
  details: string;
}

/** A stored number whose NaN may have come back as null. */
export function num(x: number | null): number {
  return x === null ? Number.NaN : x;
}

export function markerOf(runId: string, m: MarkerDbRow): Marker {
  return {
    run: runId,
    layer: m.layer,
    kind: m.kind,
    step: num(m.step),
    detected_step: num(m.detected_step),
    confidence: num(m.confidence),
    details: decodeJson(m.details) as Marker['details'],
  };
}

function listRuns(rows: RunDbRow[]): string {
  return rows
    .map((r) => `  ${r.id}  ${show(r.name)}  ${r.status}  started ${Number.isFinite(r.created_at) ? new Date(r.created_at).toISOString() : String(r.created_at)}`)
    .join('\n');
}

export function ambiguousRun(ref: string, candidates: RunDbRow[]): TidemarkError {
  return new TidemarkError(
    'TIDEMARK_ERR_RUN_AMBIGUOUS',
    `${show(ref)} matches ${candidates.length > 10 ? 'more than 10' : candidates.length} runs; name one by its id or a longer id prefix:\n${listRuns(candidates.slice(0, 10))}`,
  );
}

/** No run matched `ref`; `like` are runs with similar names, `recent` the newest (shown when nothing is alike). */
export function runRefNotFound(ref: string, like: RunDbRow[], recent: RunDbRow[]): TidemarkError {
  const shown = like.length > 0 ? like : recent;
  return new TidemarkError(
    'TIDEMARK_ERR_RUN_NOT_FOUND',
    `No run has the id, id prefix (4 characters or more) or name ${show(ref)}.` +
      (shown.length === 0
        ? ' The store has no runs.'
        : ` ${like.length > 0 ? 'Runs with similar names' : 'The most recent runs'}:\n${listRuns(shown)}`),
  );
}

export function runNotFound(runId: string, doing?: string): TidemarkError {
  return new TidemarkError(
    'TIDEMARK_ERR_RUN_NOT_FOUND',
    doing === 'append'
      ? `append: the records name run ${show(runId)}, which the store does not have; send its run record (or call beginRun) first.`
      : `No run has the id ${show(runId)}; find it with runs() or resolveRun().`,
  );
}

export function stepClash(i: number, index: number, runId: string, step: number): TypeError {
  return new TidemarkTypeError(
    'TIDEMARK_ERR_RECORD_INVALID',
    `append: record ${i}: window ${index} of run ${show(runId)} has step ${step}, which another stored window of that run already has; steps must differ between windows.`,
  );
}

/** `n` of the items, evenly spread, the first and the last included. */
export function thinEvenly<T>(items: T[], n: number): T[] {
  const out: T[] = [];
  for (let k = 0; k < n; k++) out.push(items[Math.round((k * (items.length - 1)) / (n - 1))]!);
  return out;
}

/** Steps and values (null is NaN) as points, downsampled with LTTB (Steinarsson 2013) when there are more than `limit`. */
export function downsample(steps: number[], values: (number | null)[], limit: number | undefined): SeriesPoint[] {
  const n = steps.length;
  if (limit === undefined || n <= limit) {
    const out = new Array<SeriesPoint>(n);
    for (let i = 0; i < n; i++) out[i] = { step: steps[i]!, value: num(values[i]!) };
    return out;
  }
  const ys = new Float64Array(n);
  // A Float64Array would turn null into 0: map it to NaN first.
  for (let i = 0; i < n; i++) ys[i] = num(values[i]!);
  return lttb(steps, ys, limit).map((i) => ({ step: steps[i]!, value: ys[i]! }));
}

/** A window's own row as a backend reads it. */
export interface WindowDbRow {
  idx: number;
  first_step: number;
  step: number;
  epoch: number | null;
  batches: number;
  batch_size: number | null;
  batches_per_epoch: number | null;
  pass_batches: string;
  snr_floor: number | null;
  time: number;
  noise: string | null;
}

export interface SeriesDbRow {
  id: number;
  scope: SeriesScope;
  layer: string | null;
  variable: string | null;
  metric: string;
}

function groupBy<T>(items: T[], key: (t: T) => string): Map<string, T[]> {
  const m = new Map<string, T[]>();
  for (const it of items) {
    const k = key(it);
    const list = m.get(k);
    if (list === undefined) m.set(k, [it]);
    else list.push(it);
  }
  return m;
}

/**
 * Window records rebuilt from their rows, the run's series (in creation order, which is the key order of
 * the first window that had them) and the points read for them (series id → step → value).
 */
export function assembleWindows(runId: string, rows: WindowDbRow[], series: SeriesDbRow[], values: Map<number, Map<number, number>>): WindowRecord[] {
  const records = rows.map(
    (r): WindowRecord => ({
      run: runId,
      index: r.idx,
      step: r.step,
      first_step: r.first_step,
      epoch: r.epoch,
      batches: r.batches,
      batch_size: r.batch_size,
      batches_per_epoch: r.batches_per_epoch,
      pass_batches: JSON.parse(r.pass_batches) as number[],
      snr_floor: num(r.snr_floor),
      time: r.time,
      ...(r.noise === null ? {} : { noise: decodeJson(r.noise) as NonNullable<WindowRecord['noise']> }),
      layers: {},
      network: {} as LayerStats,
      logs: {},
    }),
  );
  const valuesOf = (id: number): Map<number, number> => values.get(id) ?? new Map<number, number>();
  const has = (ids: number[], step: number): boolean => ids.some((id) => valuesOf(id).has(step));
  // Only the statistics that can be null in a record come back as null; a missing probe value stays absent.
  const fill = (target: Record<string, number | null>, list: SeriesDbRow[], step: number, nullable: boolean): void => {
    for (const s of list) {
      const v = valuesOf(s.id).get(step);
      if (v !== undefined) target[s.metric] = v;
      else if (nullable && NULLABLE_METRICS.has(s.metric)) target[s.metric] = null;
    }
  };
  const network = series.filter((s) => s.scope === 'network');
  const logs = series.filter((s) => s.scope === 'run');
  const layers = groupBy(series.filter((s) => s.scope === 'layer'), (s) => s.layer!);
  const variables = groupBy(series.filter((s) => s.scope === 'variable'), (s) => s.layer!);
  const variableGroups = new Map([...variables].map(([layer, list]) => [layer, groupBy(list, (s) => s.variable!)]));
  for (const w of records) {
    fill(w.network as unknown as Record<string, number | null>, network, w.step, true);
    fill(w.logs as unknown as Record<string, number | null>, logs, w.step, false);
    for (const [layer, list] of layers) {
      if (!has(list.map((s) => s.id), w.step)) continue;
      const stats = {} as LayerStats;
      fill(stats as unknown as Record<string, number | null>, list, w.step, true);
      const vars = variableGroups.get(layer);
      if (vars !== undefined) {
        stats.variables = {};
        for (const [variable, vlist] of vars) {
          if (!has(vlist.map((s) => s.id), w.step)) continue;
          const v = {} as VariableStats;
          fill(v as unknown as Record<string, number | null>, vlist, w.step, true);
          stats.variables[variable] = v;
        }
      }
      w.layers[layer] = stats;
    }
  }
  return records;
}
