/**
 * A stored run as CSV or JSON Lines, and JSON Lines back into a store.
 *
 * CSV (RFC 4180) is wide: one row per window × entry (the network, each layer, each variable), every
 * metric a column. That is the tidy shape a spreadsheet filters and pandas plots directly
 * (`df[df.layer == 'dense_Dense1'].plot(x='step', y='grad_snr')`); a long (step, layer, metric,
 * value) table would be ~12 times as many rows and need a pivot before any chart.
 *
 * JSON Lines holds the same records the JSON Lines sink writes (run, windows, markers, warnings,
 * end), so `importJsonl` reads an export, or a sink's file, into another store.
 */
import { createReadStream } from 'node:fs';
import { createInterface } from 'node:readline';
import { TidemarkError, TidemarkTypeError } from '../errors.js';
import type { RunInfo, SinkRecord } from '../protocol/records.js';
import { csvLine, type CsvValue } from './csv.js';
import { decodeRecord, encodeRecord } from './sink.js';
import type { RunDetail, Store } from './store.js';

export type ExportFormat = 'csv' | 'jsonl';

/** The RunInfo a run began with, rebuilt from its stored row. */
export function runInfoOf(run: RunDetail): RunInfo {
  return {
    id: run.id,
    name: run.name,
    group: run.group,
    tags: run.tags,
    started_at: run.created_at,
    config: run.config,
    layers: run.layers,
  };
}

/** The fixed leading columns of the CSV export, before the metrics and the logs. */
export const CSV_WINDOW_COLUMNS = [
  'run',
  'window',
  'first_step',
  'step',
  'epoch',
  'window_batches',
  'batch_size',
  'batches_per_epoch',
  'pass_batches',
  'snr_floor',
  'time',
  'noise',
  'scope',
  'layer',
  'variable',
] as const;

/**
 * The run as CSV records (RFC 4180, CRLF-terminated), header first. One row per window and entry:
 * `scope` is `network`, `layer` or `variable` (then `layer` is the owning layer). `window_batches`
 * is the window's K; the metric `batches` counts the gradients that entered the statistics. What
 * `fit` logged (loss, val_loss, …) is repeated on every row of its window, so any filtered view keeps
 * it; a log whose name clashes with another column gets the prefix `log_`. Empty fields are missing
 * values (null, or a log not recorded in that window); NaN and ±Infinity are written as `NaN`,
 * `Infinity` and `-Infinity`, numbers with round-trip precision.
 */
export function* csvLines(store: Store, runId: string): Generator<string> {
  const windows = store.windows(runId);
  const metrics: string[] = [];
  const logs: string[] = [];
  const seenMetric = new Set<string>();
  const seenLog = new Set<string>();
  const addMetrics = (stats: object): void => {
    for (const key of Object.keys(stats)) {
      if (key === 'variables' || seenMetric.has(key)) continue;
      seenMetric.add(key);
      metrics.push(key);
    }
  };
  for (const w of windows) {
    addMetrics(w.network);
    for (const l of Object.values(w.layers)) {
      addMetrics(l);
      for (const v of Object.values(l.variables ?? {})) addMetrics(v);
    }
    for (const key of Object.keys(w.logs)) {
      if (!seenLog.has(key)) {
        seenLog.add(key);
        logs.push(key);
      }
    }
  }
  const taken = new Set<string>([...CSV_WINDOW_COLUMNS, ...metrics]);
  const logColumns = logs.map((key) => {
    let col = key;
    while (taken.has(col)) col = `log_${col}`;
    taken.add(col);
    return col;
  });
  yield csvLine([...CSV_WINDOW_COLUMNS, ...metrics, ...logColumns]);

  for (const w of windows) {
    const head: CsvValue[] = [
      w.run,
      w.index,
      w.first_step,
      w.step,
      w.epoch,
      w.batches,
      w.batch_size,
      w.batches_per_epoch,
      JSON.stringify(w.pass_batches),
      w.snr_floor,
      w.time,
      w.noise == null ? null : JSON.stringify(w.noise),
    ];
    const tail = logs.map((key) => w.logs[key] ?? null);
    const row = (scope: string, layer: string | null, variable: string | null, stats: object): string => {
      const values = stats as Record<string, number | null | undefined>;
      return csvLine([...head, scope, layer, variable, ...metrics.map((m) => values[m] ?? null), ...tail]);
    };
    yield row('network', null, null, w.network);
    for (const [layer, stats] of Object.entries(w.layers)) {
      yield row('layer', layer, null, stats);
      for (const [variable, vstats] of Object.entries(stats.variables ?? {})) yield row('variable', layer, variable, vstats);
    }
  }
}

/** The run as JSON Lines records (each line ending in `\n`): run, windows, markers, warnings, then end if it ended. */
export function* jsonlLines(store: Store, runId: string): Generator<string> {
  const run = store.resolveRun(runId);
  if (run.id !== runId) {
    throw new TidemarkError('TIDEMARK_ERR_RUN_NOT_FOUND', `No run has the id ${JSON.stringify(runId)}; resolve a name or prefix with resolveRun() first.`);
  }
  const line = (r: SinkRecord): string => `${encodeRecord(r)}\n`;
  yield line({ type: 'run', run: runInfoOf(run) });
  for (const window of store.windows(runId)) yield line({ type: 'window', window });
  for (const marker of store.markers(runId)) yield line({ type: 'marker', marker });
  for (const w of store.warnings(runId)) yield line({ type: 'warning', ...w });
  if (run.ended_at !== null) {
    yield line({ type: 'end', run: runId, status: run.status, step: run.end_step ?? Number.NaN, time: run.ended_at });
  }
}

/** The lines of {@link csvLines} or {@link jsonlLines}, for streaming a large run. */
export function exportLines(store: Store, runId: string, format: ExportFormat): Generator<string> {
  if (format === 'csv') return csvLines(store, runId);
  if (format === 'jsonl') return jsonlLines(store, runId);
  throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `export: format must be 'csv' or 'jsonl'; received ${JSON.stringify(format)}.`);
}

/** The whole export as one string. */
export function exportRun(store: Store, runId: string, format: ExportFormat): string {
  let text = '';
  for (const l of exportLines(store, runId, format)) text += l;
  return text;
}

/** Records appended per transaction while importing. */
const IMPORT_BATCH = 500;

/**
 * Appends the records of a JSON Lines file (an export, or a JSON Lines sink's file) to `store`, in
 * transactions of a few hundred records. Windows and markers the store already has are skipped, so
 * importing a file again, or after an interrupted import, completes it without doubling anything.
 * A run the file does not end keeps the time of its last window as its heartbeat, so it reads as
 * `interrupted`, as it was. A torn last line (a crash mid-write) is skipped.
 *
 * @returns the ids of the runs the file begins, in file order.
 * @throws TidemarkError TIDEMARK_ERR_FILE_READ when the file cannot be read; TidemarkTypeError
 *   TIDEMARK_ERR_RECORD_INVALID naming the line when a line is not a record.
 */
export async function importJsonl(store: Store, path: string): Promise<string[]> {
  const runs: string[] = [];
  const started = new Map<string, number>();
  const ended = new Set<string>();
  const lastTime = new Map<string, number>();
  let batch: SinkRecord[] = [];
  let batchLine = 0;
  let pendingError: { line: number; error: unknown } | null = null;
  let lineNo = 0;

  const flush = (): void => {
    if (batch.length === 0) return;
    try {
      store.append(batch);
    } catch (e) {
      if (e instanceof TidemarkTypeError && e.code === 'TIDEMARK_ERR_RECORD_INVALID') {
        throw new TidemarkTypeError('TIDEMARK_ERR_RECORD_INVALID', `${path}, lines ${batchLine}–${lineNo}: ${e.message}`);
      }
      throw e;
    }
    batch = [];
  };

  try {
    const lines = createInterface({ input: createReadStream(path, 'utf8'), crlfDelay: Infinity });
    for await (const text of lines) {
      lineNo++;
      if (text.trim() === '') continue;
      // A bad line is an error only if another line follows it: the last one may be torn by a crash.
      if (pendingError !== null) throw badLine(path, pendingError.line, pendingError.error);
      let record: SinkRecord;
      try {
        record = decodeRecord(text);
        if (typeof record !== 'object' || record === null || typeof record.type !== 'string') throw new Error('not a record');
      } catch (error) {
        pendingError = { line: lineNo, error };
        continue;
      }
      if (batch.length === 0) batchLine = lineNo;
      batch.push(record);
      if (record.type === 'run' && typeof record.run?.id === 'string' && !started.has(record.run.id)) {
        started.set(record.run.id, record.run.started_at);
        runs.push(record.run.id);
      } else if (record.type === 'end') ended.add(record.run);
      else if (record.type === 'window' && typeof record.window?.time === 'number') {
        lastTime.set(record.window.run, Math.max(lastTime.get(record.window.run) ?? -Infinity, record.window.time));
      }
      if (batch.length >= IMPORT_BATCH) flush();
    }
  } catch (e) {
    if (e instanceof TidemarkError || e instanceof TidemarkTypeError) throw e;
    throw new TidemarkError('TIDEMARK_ERR_FILE_READ', `importJsonl: could not read ${JSON.stringify(path)} (${describe(e)}).`, { cause: e });
  }
  flush();
  for (const id of runs) {
    if (!ended.has(id)) store.heartbeat(id, lastTime.get(id) ?? started.get(id)!);
  }
  return runs;
}

function badLine(path: string, line: number, error: unknown): TidemarkTypeError {
  return new TidemarkTypeError(
    'TIDEMARK_ERR_RECORD_INVALID',
    `${path}, line ${line}: not a JSON record (${describe(error)}); only the last line of a file may be incomplete.`,
  );
}

function describe(e: unknown): string {
  if (typeof e === 'object' && e !== null && 'code' in e && typeof e.code === 'string') return e.code;
  return e instanceof Error ? e.message : String(e);
}
