import type { RunInfo, SinkRecord } from '../protocol/records.js';
import type { Sink } from './sink.js';

/** Keeps every record in an array: for tests, scripts and short runs. */
export class MemorySink implements Sink {
  readonly records: SinkRecord[] = [];
  readonly dropped = 0;

  async open(run: RunInfo): Promise<void> {
    void run;
  }

  write(record: SinkRecord): void {
    this.records.push(record);
  }

  async flush(): Promise<void> {}

  async close(): Promise<void> {}
}
