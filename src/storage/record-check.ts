/**
 * Checks of the records a store is asked to keep, shared by every Store backend: each record is checked
 * and turned into the rows it becomes before anything is written, and a bad one is refused with
 * TIDEMARK_ERR_RECORD_INVALID naming the record and the field.
 */
import { TidemarkTypeError } from '../errors.js';
import { encodeJson } from '../protocol/json-codec.js';
import type { LayerInfo, RunStatus } from '../protocol/records.js';
import type { SeriesScope } from './store.js';

export const RUN_STATUSES: readonly RunStatus[] = ['running', 'finished', 'failed', 'interrupted'];

/** A value as a message shows it: short strings quoted, other kinds named. */
export function show(value: unknown): string {
  if (typeof value === 'string') return JSON.stringify(value.length > 60 ? `${value.slice(0, 60)}…` : value);
  if (typeof value === 'number' || typeof value === 'boolean' || value === null || value === undefined) return String(value);
  return Array.isArray(value) ? 'an array' : `a ${typeof value}`;
}

export function badRecord(message: string): TidemarkTypeError {
  return new TidemarkTypeError('TIDEMARK_ERR_RECORD_INVALID', `append: ${message}`);
}

export function isObject(x: unknown): x is Record<string, unknown> {
  return typeof x === 'object' && x !== null && !Array.isArray(x);
}

function requireString(what: string, x: unknown): string {
  if (typeof x !== 'string') throw badRecord(`${what} must be a string; received ${show(x)}.`);
  return x;
}

function requireFinite(what: string, x: unknown): number {
  if (typeof x !== 'number' || !Number.isFinite(x)) throw badRecord(`${what} must be a finite number; received ${show(x)}.`);
  return x;
}

function requireNumber(what: string, x: unknown): number {
  if (typeof x !== 'number') throw badRecord(`${what} must be a number (NaN and ±Infinity allowed); received ${show(x)}.`);
  return x;
}

function optionalFinite(what: string, x: unknown): number | null {
  return x === null ? null : requireFinite(what, x);
}

/** A run record, checked; JSON fields already encoded. */
export interface RunRowIn {
  id: string;
  name: string;
  group: string | null;
  tags: string;
  started: number;
  config: string;
  layers: { position: number; name: string; class_name: string; params: number; variables: string }[];
}

export function checkRun(run: unknown): RunRowIn {
  if (!isObject(run)) throw badRecord(`a run record needs a 'run' object; received ${show(run)}.`);
  const id = requireString('run.id', run.id);
  if (id.length === 0) throw badRecord('run.id must not be empty.');
  const name = requireString('run.name', run.name);
  const group = run.group === null ? null : requireString('run.group', run.group);
  if (!isObject(run.tags) || !Object.values(run.tags).every((v) => typeof v === 'string')) {
    throw badRecord(`run.tags must be an object of strings; received ${show(run.tags)}.`);
  }
  const started = requireFinite('run.started_at', run.started_at);
  if (!isObject(run.config)) throw badRecord(`run.config must be an object; received ${show(run.config)}.`);
  if (!Array.isArray(run.layers)) throw badRecord(`run.layers must be an array; received ${show(run.layers)}.`);
  const layers = (run.layers as LayerInfo[]).map((l, position) => {
    if (!isObject(l)) throw badRecord(`run.layers[${position}] must be an object.`);
    return {
      position,
      name: requireString(`run.layers[${position}].name`, l.name),
      class_name: requireString(`run.layers[${position}].class_name`, l.class_name),
      params: requireFinite(`run.layers[${position}].params`, l.params),
      variables: encodeJson(l.variables ?? []),
    };
  });
  return { id, name, group, tags: encodeJson(run.tags), started, config: encodeJson(run.config), layers };
}

/** One numeric value of a window: `value` null means the series exists but has no point at this step. */
export interface PointIn {
  scope: SeriesScope;
  layer: string | null;
  variable: string | null;
  metric: string;
  value: number | null;
}

/** A window record, checked: its own row and every point it carries, in record key order. */
export interface WindowRowIn {
  run: string;
  index: number;
  first_step: number;
  step: number;
  epoch: number | null;
  batches: number;
  batch_size: number | null;
  batches_per_epoch: number | null;
  pass_batches: string;
  /** NaN allowed. */
  snr_floor: number;
  time: number;
  noise: string | null;
  points: PointIn[];
}

export function checkWindow(w: unknown, i: number): WindowRowIn {
  if (!isObject(w)) throw badRecord(`record ${i}: a window record needs a 'window' object.`);
  const runId = requireString(`record ${i}: window.run`, w.run);
  const index = requireFinite(`record ${i}: window.index`, w.index);
  const step = requireFinite(`record ${i}: window.step`, w.step);
  if (!Array.isArray(w.pass_batches) || !w.pass_batches.every((k) => typeof k === 'number')) {
    throw badRecord(`record ${i}: window.pass_batches must be an array of numbers.`);
  }
  if (w.noise != null && (!isObject(w.noise) || typeof (w.noise as { status?: unknown }).status !== 'string')) {
    throw badRecord(`record ${i}: window.noise must be null or an object with a status.`);
  }
  if (!isObject(w.layers) || !isObject(w.network) || !isObject(w.logs)) {
    throw badRecord(`record ${i}: window ${index} of run ${show(runId)} needs 'layers', 'network' and 'logs' objects.`);
  }
  const row: WindowRowIn = {
    run: runId,
    index,
    first_step: requireFinite(`record ${i}: window.first_step`, w.first_step),
    step,
    epoch: optionalFinite(`record ${i}: window.epoch`, w.epoch),
    batches: requireFinite(`record ${i}: window.batches`, w.batches),
    batch_size: optionalFinite(`record ${i}: window.batch_size`, w.batch_size),
    batches_per_epoch: optionalFinite(`record ${i}: window.batches_per_epoch`, w.batches_per_epoch),
    pass_batches: JSON.stringify(w.pass_batches),
    snr_floor: requireNumber(`record ${i}: window.snr_floor`, w.snr_floor),
    time: requireFinite(`record ${i}: window.time`, w.time),
    noise: w.noise == null ? null : encodeJson(w.noise),
    points: [],
  };
  const add = (scope: SeriesScope, layer: string | null, variable: string | null, stats: object): void => {
    for (const [metric, value] of Object.entries(stats)) {
      if (metric === 'variables' && (scope === 'layer' || scope === 'network')) continue;
      if (value !== null && typeof value !== 'number') {
        throw badRecord(`record ${i}: metric ${show(metric)} of ${scope} ${show(variable ?? layer ?? '')} must be a number or null; received ${show(value)}.`);
      }
      // A null metric (noise_scale before it can be estimated) is no point, but its series exists,
      // so the windows read back hold the key with null.
      row.points.push({ scope, layer, variable, metric, value: value as number | null });
    }
  };
  add('network', null, null, w.network);
  for (const [layer, stats] of Object.entries(w.layers)) {
    if (!isObject(stats)) throw badRecord(`record ${i}: window.layers[${show(layer)}] must be an object.`);
    add('layer', layer, null, stats);
    const vars = stats.variables;
    if (vars === undefined) continue;
    if (!isObject(vars)) throw badRecord(`record ${i}: window.layers[${show(layer)}].variables must be an object.`);
    for (const [variable, vstats] of Object.entries(vars)) {
      if (!isObject(vstats)) throw badRecord(`record ${i}: variables[${show(variable)}] must be an object.`);
      add('variable', layer, variable, vstats);
    }
  }
  add('run', null, null, w.logs);
  return row;
}

/** A marker, checked; NaN allowed in its numbers. */
export interface MarkerRowIn {
  run: string;
  layer: string | null;
  kind: string;
  step: number;
  detected_step: number;
  confidence: number;
  details: string;
}

export function checkMarker(m: unknown, i: number): MarkerRowIn {
  if (!isObject(m)) throw badRecord(`record ${i}: a marker record needs a 'marker' object.`);
  const run = requireString(`record ${i}: marker.run`, m.run);
  const layer = m.layer === null ? null : requireString(`record ${i}: marker.layer`, m.layer);
  const details = m.details === undefined ? {} : m.details;
  if (!isObject(details)) throw badRecord(`record ${i}: marker.details must be an object.`);
  return {
    run,
    layer,
    kind: requireString(`record ${i}: marker.kind`, m.kind),
    step: requireNumber(`record ${i}: marker.step`, m.step),
    detected_step: requireNumber(`record ${i}: marker.detected_step`, m.detected_step),
    confidence: requireNumber(`record ${i}: marker.confidence`, m.confidence),
    details: encodeJson(details),
  };
}

export interface WarningRowIn {
  run: string;
  code: string;
  message: string;
  step: number | null;
  time: number;
}

export function checkWarning(r: Record<string, unknown>, i: number): WarningRowIn {
  return {
    run: requireString(`record ${i}: warning.run`, r.run),
    code: requireString(`record ${i}: warning.code`, r.code),
    message: requireString(`record ${i}: warning.message`, r.message),
    step: optionalFinite(`record ${i}: warning.step`, r.step),
    time: requireFinite(`record ${i}: warning.time`, r.time),
  };
}

export interface EndRowIn {
  run: string;
  status: RunStatus;
  time: number;
  /** NaN allowed. */
  step: number;
}

export function checkEnd(r: Record<string, unknown>, i: number): EndRowIn {
  const run = requireString(`record ${i}: end.run`, r.run);
  const status = r.status as RunStatus;
  if (!RUN_STATUSES.includes(status)) {
    throw badRecord(`record ${i}: end.status must be one of ${RUN_STATUSES.join(', ')}; received ${show(r.status)}.`);
  }
  return { run, status, time: requireFinite(`record ${i}: end.time`, r.time), step: requireNumber(`record ${i}: end.step`, r.step) };
}

export type CheckedRecord =
  | { type: 'run'; run: RunRowIn }
  | { type: 'window'; window: WindowRowIn }
  | { type: 'marker'; marker: MarkerRowIn }
  | { type: 'warning'; warning: WarningRowIn }
  | { type: 'end'; end: EndRowIn };

/** Every record of a call checked, in order, before any is written. */
export function checkRecords(records: unknown): CheckedRecord[] {
  if (!Array.isArray(records)) throw badRecord(`expected an array of records; received ${show(records)}.`);
  return (records as unknown[]).map((r, i): CheckedRecord => {
    if (!isObject(r)) throw badRecord(`record ${i} is ${show(r)}, not an object.`);
    switch (r.type) {
      case 'run':
        return { type: 'run', run: checkRun(r.run) };
      case 'window':
        return { type: 'window', window: checkWindow(r.window, i) };
      case 'marker':
        return { type: 'marker', marker: checkMarker(r.marker, i) };
      case 'warning':
        return { type: 'warning', warning: checkWarning(r, i) };
      case 'end':
        return { type: 'end', end: checkEnd(r, i) };
      default:
        throw badRecord(`record ${i} has type ${show(r.type)}; expected run, window, marker, warning or end.`);
    }
  });
}

/** The run a record belongs to, as it names it, or undefined when it names none. */
export function ownerOf(r: unknown): unknown {
  if (!isObject(r)) return undefined;
  if (r.type === 'run') return (r.run as { id?: unknown } | undefined)?.id;
  if (r.type === 'window') return (r.window as { run?: unknown } | undefined)?.run;
  if (r.type === 'marker') return (r.marker as { run?: unknown } | undefined)?.run;
  return r.run;
}

/** Checks the arguments of appendBatch: a run id, a sequence number, and records that all belong to that run. */
export function checkBatch(runId: unknown, seq: unknown, records: unknown): void {
  if (typeof runId !== 'string' || runId.length === 0) throw badRecord(`appendBatch: run must be a non-empty string; received ${show(runId)}.`);
  if (!Number.isSafeInteger(seq) || (seq as number) < 0) throw badRecord(`appendBatch: seq must be an integer ≥ 0; received ${show(seq)}.`);
  if (!Array.isArray(records)) throw badRecord(`expected an array of records; received ${show(records)}.`);
  records.forEach((r: unknown, i: number) => {
    const owner = ownerOf(r);
    if (owner !== runId) throw badRecord(`record ${i} of batch ${seq as number} belongs to run ${show(owner)}, not to the batch's run ${show(runId)}.`);
  });
}
