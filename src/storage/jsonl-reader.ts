import { createReadStream } from 'node:fs';
import { createInterface } from 'node:readline';
import type { RunInfo, SinkRecord, WindowRecord } from '../protocol/records.js';
import { decodeRecord, recordsOfLine } from './sink.js';

/** Reads a JSON Lines store record by record. A torn last line (a crash mid-write) is skipped. */
export async function* readJsonl(path: string): AsyncGenerator<SinkRecord> {
  const lines = createInterface({ input: createReadStream(path, 'utf8'), crlfDelay: Infinity });
  for await (const line of lines) {
    if (line.trim() === '') continue;
    let records: SinkRecord[];
    try {
      records = recordsOfLine(decodeRecord(line));
    } catch {
      // Only the final line can be partial; anything else would be a corrupt file, still skipped.
      continue;
    }
    yield* records;
  }
}

export interface RunSummary {
  run: RunInfo;
  windows: number;
  last: WindowRecord | null;
  status: string;
}

/** One summary per run in the file, in the order the runs started. */
export async function summarizeJsonl(path: string): Promise<RunSummary[]> {
  const runs = new Map<string, RunSummary>();
  for await (const r of readJsonl(path)) {
    if (r.type === 'run') runs.set(r.run.id, { run: r.run, windows: 0, last: null, status: 'running' });
    else if (r.type === 'window') {
      const s = runs.get(r.window.run);
      if (s) {
        s.windows++;
        s.last = r.window;
      }
    } else if (r.type === 'end') {
      const s = runs.get(r.run);
      if (s) s.status = r.status;
    }
  }
  return [...runs.values()];
}
