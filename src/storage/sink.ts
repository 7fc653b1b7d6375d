/**
 * Where a monitor's records go. A sink's `write` is called from training hooks, so it must return
 * at once and buffer; the slow part happens in `flush`, off the training path.
 */
import { decodeJson, encodeJson } from '../protocol/json-codec.js';
import type { RunInfo, SinkRecord } from '../protocol/records.js';

export { decodeJson, encodeJson };

export interface Sink {
  /** Called once before any record. May reject: the monitor then degrades to memory only. */
  open(run: RunInfo): Promise<void>;
  /** Queue a record. Must not throw or block. */
  write(record: SinkRecord): void;
  /** Write what is queued. Rejects when that fails; what could not be written stays queued. */
  flush(): Promise<void>;
  /** Flush and release. */
  close(): Promise<void>;
  /** Records given up after repeated failures (the buffer bound was reached). */
  readonly dropped: number;
}

export function encodeRecord(record: SinkRecord): string {
  return encodeJson(record);
}

/** Inverse of {@link encodeRecord}. */
export function decodeRecord(line: string): SinkRecord {
  return decodeJson(line) as SinkRecord;
}

/**
 * The records one line of a JSON Lines file holds: the record itself, or, for a line of a remote writer's
 * spill file (a `batch` message of the ingest protocol), the records of that batch.
 */
export function recordsOfLine(value: unknown): SinkRecord[] {
  if (typeof value !== 'object' || value === null) throw new Error('not a record');
  const v = value as { type?: unknown; records?: unknown };
  if (v.type === 'batch') {
    if (!Array.isArray(v.records)) throw new Error('a batch line without records');
    return v.records as SinkRecord[];
  }
  if (typeof v.type !== 'string') throw new Error('not a record');
  return [value as SinkRecord];
}
