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
import { checkOptions } from '../option-check.js';
import type { RunInfo, SinkRecord } from '../protocol/records.js';
import { csvLine, type CsvValue } from './csv.js';
import { decodeRecord, encodeRecord, recordsOfLine } from './sink.js';
import { toAsyncStore, type AnyStore, type AsyncStore } from './async-store.js';
import type { RunDetail } from './store.js';

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
 * it; a log whose name clashes with another column gets the prefix `log_`. `epoch` counts from 1
 * (the window records keep fit's 0-based index). Empty fields are missing
 * values (null, or a log not recorded in that window); NaN and ±Infinity are written as `NaN`,
 * `Infinity` and `-Infinity`, numbers with round-trip precision.
 */
export async function* csvLines(store: AnyStore, runId: string): AsyncGenerator<string> {
  const windows = await toAsyncStore(store).windows(runId);
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
      // Counted from 1, as fit's own progress lines, the demo and `summary` count; records keep fit's index.
      w.epoch == null ? null : w.epoch + 1,
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
export async function* jsonlLines(anyStore: AnyStore, runId: string): AsyncGenerator<string> {
  const store = toAsyncStore(anyStore);
  const run = await store.resolveRun(runId);
  if (run.id !== runId) {
    throw new TidemarkError('TIDEMARK_ERR_RUN_NOT_FOUND', `No run has the id ${JSON.stringify(runId)}; resolve a name or prefix with resolveRun() first.`);
  }
  const line = (r: SinkRecord): string => `${encodeRecord(r)}\n`;
  yield line({ type: 'run', run: runInfoOf(run) });
  for (const window of await store.windows(runId)) yield line({ type: 'window', window });
  for (const marker of await store.markers(runId)) yield line({ type: 'marker', marker });
  for (const w of await store.warnings(runId)) yield line({ type: 'warning', ...w });
  if (run.ended_at !== null) {
    yield line({ type: 'end', run: runId, status: run.status, step: run.end_step ?? Number.NaN, time: run.ended_at });
  }
}

/** The lines of {@link csvLines} or {@link jsonlLines}, for streaming a large run. */
export function exportLines(store: AnyStore, runId: string, format: ExportFormat): AsyncGenerator<string> {
  if (format === 'csv') return csvLines(store, runId);
  if (format === 'jsonl') return jsonlLines(store, runId);
  throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `export: format must be 'csv' or 'jsonl'; received ${JSON.stringify(format)}.`);
}

/** The whole export as one string. */
export async function exportRun(store: AnyStore, runId: string, format: ExportFormat): Promise<string> {
  let text = '';
  for await (const l of exportLines(store, runId, format)) text += l;
  return text;
}

/** Records appended per transaction while importing. */
const IMPORT_BATCH = 500;

/** What an import found and did. */
export interface ImportReport {
  /** The runs the file holds (by their run records, or by their batches for a spill file), in file order. */
  runs: string[];
  /** Per run: windows in the file, and how many of them the store did not have before. */
  windows: Record<string, { inFile: number; added: number }>;
  /** Runs the file holds no end record for (the writer stopped, or the file was cut). */
  unended: string[];
  /** The last line was cut (a crash or copy mid-write) and was skipped. */
  tornLastLine: boolean;
}

interface FileScan {
  runs: string[];
  windowsInFile: Map<string, number>;
  /** Per run with a run record: its start; per run with windows: the time of its last one (an unended run's heartbeat). */
  startedAt: Map<string, number>;
  lastTime: Map<string, number>;
  ended: Set<string>;
  tornLastLine: boolean;
}

/** Reads the whole file once without writing: what it holds, and whether it is complete. */
async function scanJsonl(path: string, onRecord?: (record: SinkRecord, line: number) => Promise<void> | void): Promise<FileScan> {
  const scan: FileScan = { runs: [], windowsInFile: new Map(), startedAt: new Map(), lastTime: new Map(), ended: new Set(), tornLastLine: false };
  let pendingError: { line: number; error: unknown } | null = null;
  let lineNo = 0;
  const see = (run: unknown): void => {
    if (typeof run === 'string' && !scan.windowsInFile.has(run)) {
      scan.windowsInFile.set(run, 0);
      scan.runs.push(run);
    }
  };
  try {
    const lines = createInterface({ input: createReadStream(path, 'utf8'), crlfDelay: Infinity });
    for await (const text of lines) {
      lineNo++;
      if (text.trim() === '') continue;
      // A bad line is an error only if another line follows it: the last one may be torn by a crash.
      if (pendingError !== null) throw badLine(path, pendingError.line, pendingError.error);
      let records: SinkRecord[];
      try {
        records = recordsOfLine(decodeRecord(text));
      } catch (error) {
        pendingError = { line: lineNo, error };
        continue;
      }
      for (const record of records) {
        if (record.type === 'run' && typeof record.run?.id === 'string') {
          see(record.run.id);
          if (!scan.startedAt.has(record.run.id)) scan.startedAt.set(record.run.id, record.run.started_at);
        } else if (record.type === 'end') {
          see(record.run);
          scan.ended.add(record.run);
        } else if (record.type === 'window') {
          const run = record.window?.run;
          see(run);
          scan.windowsInFile.set(run, (scan.windowsInFile.get(run) ?? 0) + 1);
          if (typeof record.window?.time === 'number') scan.lastTime.set(run, Math.max(scan.lastTime.get(run) ?? -Infinity, record.window.time));
        }
        await onRecord?.(record, lineNo);
      }
    }
  } catch (e) {
    if (e instanceof TidemarkError || e instanceof TidemarkTypeError) throw e;
    throw new TidemarkError('TIDEMARK_ERR_FILE_READ', `importJsonl: could not read ${JSON.stringify(path)} (${describe(e)}).`, { cause: e });
  }
  scan.tornLastLine = pendingError !== null;
  return scan;
}

/** Windows the store holds for the run, or null when it does not know the run. */
async function windowsStored(store: AsyncStore, runId: string): Promise<number | null> {
  try {
    const run = await store.resolveRun(runId);
    return run.id === runId ? run.windows : null;
  } catch {
    return null;
  }
}

/**
 * Appends the records of a JSON Lines file (an export, a JSON Lines sink's file, or a remote writer's spill
 * file of batches) to `store`, in transactions of a few hundred records. Windows and markers the store
 * already has are skipped, so importing a file again, or after an interrupted import, completes it without
 * doubling anything (the report says how many windows were new).
 *
 * An incomplete file (a run without an end record, or a last line cut mid-write) is refused before anything
 * is written unless `partial` is true; then the complete lines are imported and a run the file does not end
 * keeps the time of its last window as its heartbeat, so it reads as `interrupted`, as it was.
 *
 * @throws TidemarkError TIDEMARK_ERR_IMPORT_INCOMPLETE (nothing written) for an incomplete file without
 *   `partial`; TIDEMARK_ERR_FILE_READ when the file cannot be read; TidemarkTypeError
 *   TIDEMARK_ERR_RECORD_INVALID naming the line when a line is not a record, or a spill file's run is unknown.
 */
export async function importJsonl(anyStore: AnyStore, path: string, options: { partial?: boolean } = {}): Promise<ImportReport> {
  const store = toAsyncStore(anyStore);
  const { partial } = checkOptions<{ partial: boolean }>(options, { partial: { type: 'boolean' } }, { partial: false }, { owner: 'importJsonl' });
  const scan = await scanJsonl(path);
  const unended = scan.runs.filter((id) => !scan.ended.has(id));
  if (!partial && (unended.length > 0 || scan.tornLastLine)) {
    const what = [
      ...(scan.tornLastLine ? ['its last line is cut off'] : []),
      ...(unended.length > 0 ? [`run${unended.length === 1 ? '' : 's'} ${unended.join(', ')} ${unended.length === 1 ? 'has' : 'have'} no end record (the writer stopped or the file was cut)`] : []),
    ];
    throw new TidemarkError(
      'TIDEMARK_ERR_IMPORT_INCOMPLETE',
      `${path} is incomplete: ${what.join('; ')}. Nothing was imported. Import what is there with --partial (importJsonl(store, path, { partial: true })); such runs read as interrupted.`,
    );
  }
  for (const id of scan.runs) {
    if (!scan.startedAt.has(id) && (await windowsStored(store, id)) === null) {
      throw new TidemarkTypeError(
        'TIDEMARK_ERR_RECORD_INVALID',
        `${path} holds records of run ${id} but not its run record, and this store does not know the run: it is a spill file whose first batches reached the server. Send it there with 'tidemark resend ${path} --to <server address>'.`,
      );
    }
  }
  const before = new Map<string, number>();
  for (const id of scan.runs) before.set(id, (await windowsStored(store, id)) ?? 0);
  let batch: SinkRecord[] = [];
  let batchLine = 0;
  let lineNo = 0;
  const flush = async (): Promise<void> => {
    if (batch.length === 0) return;
    try {
      await store.append(batch);
    } catch (e) {
      if (e instanceof TidemarkTypeError && e.code === 'TIDEMARK_ERR_RECORD_INVALID') {
        throw new TidemarkTypeError('TIDEMARK_ERR_RECORD_INVALID', `${path}, lines ${batchLine}–${lineNo}: ${e.message}`);
      }
      throw e;
    }
    batch = [];
  };
  // The second pass writes; what the file holds is known from the first.
  await scanJsonl(path, async (record, line) => {
    lineNo = line;
    if (batch.length === 0) batchLine = line;
    batch.push(record);
    if (batch.length >= IMPORT_BATCH) await flush();
  });
  await flush();
  for (const id of unended) {
    const at = scan.lastTime.get(id) ?? scan.startedAt.get(id);
    if (at !== undefined) await store.heartbeat(id, at);
  }
  const windows: ImportReport['windows'] = {};
  for (const id of scan.runs) {
    windows[id] = { inFile: scan.windowsInFile.get(id) ?? 0, added: ((await windowsStored(store, id)) ?? 0) - (before.get(id) ?? 0) };
  }
  return { runs: scan.runs, windows, unended, tornLastLine: scan.tornLastLine };
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
