/**
 * A bare /ingest client for the benches: sends numbered batches and notes when each one's ack arrives
 * (bench/server.ts and bench/postgres.ts time the path from an ack to a viewer).
 */
import type { RunInfo, SinkRecord } from '../src/protocol/records.js';
import { encodeRecord } from '../src/storage/sink.js';
import WebSocket from 'ws';

/** A bare /ingest client that notes when each batch's ack arrives. */
export class AckingWriter {
  readonly ackAt = new Map<number, number>();
  readonly sentAt = new Map<number, number>();
  readonly errors: string[] = [];
  private waiters = new Map<number, () => void>();

  private constructor(private readonly ws: WebSocket, private readonly runId: string) {
    ws.on('message', (data) => {
      const at = performance.now();
      const m = JSON.parse(String(data)) as { type: string; seq?: number; code?: string };
      if (m.type === 'ack' && m.seq !== undefined) {
        this.ackAt.set(m.seq, at);
        this.waiters.get(m.seq)?.();
        this.waiters.delete(m.seq);
      } else this.errors.push(`${m.code ?? m.type}`);
    });
  }

  static async open(url: string, run: RunInfo): Promise<AckingWriter> {
    const ws = new WebSocket(`${url}/ingest`);
    await new Promise<void>((resolve, reject) => {
      ws.once('open', () => resolve());
      ws.once('error', reject);
    });
    const w = new AckingWriter(ws, run.id);
    const acked = new Promise<void>((r) => w.waiters.set(0, r));
    w.send(0, [{ type: 'run', run }]);
    await acked;
    return w;
  }

  send(seq: number, records: SinkRecord[]): void {
    this.sentAt.set(seq, performance.now());
    this.ws.send(`{"v":1,"type":"batch","run":${JSON.stringify(this.runId)},"seq":${seq},"records":[${records.map(encodeRecord).join(',')}]}`);
  }

  close(): void {
    this.ws.close();
  }
}
