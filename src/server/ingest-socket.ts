/**
 * `/ingest`: remote writers send batches of records (protocol v1); each batch is checked, stored once per
 * (run, seq) and acknowledged, and the watcher is nudged so viewers get the new windows at once.
 */
import { Ajv } from 'ajv';
import type { WebSocket } from 'ws';
import { TidemarkError } from '../errors.js';
import type { IngestReply } from '../protocol/messages.js';
import { windowPoints } from '../protocol/points.js';
import type { SinkRecord } from '../protocol/records.js';
import { encodeJson } from '../storage/sink.js';
import type { ServerContext } from './context.js';
import { batchSchema } from './schemas.js';
import { parseFrame, replyError } from './socket-frames.js';

export interface IngestSocket {
  /** Takes a writer's connection, already upgraded. */
  accept(ws: WebSocket): void;
  /** Ends every writer's connection. */
  close(): void;
}

/** The ingest endpoint; `ingestRate` is the batches a second one connection may send. */
export function ingestSocket(ctx: ServerContext, ingestRate: number): IngestSocket {
  const { store, counters, watcher } = ctx;
  const sockets = new Set<WebSocket>();
  const validateBatch = batchSchema(new Ajv({ allErrors: false }));

  const accept = (ws: WebSocket): void => {
    sockets.add(ws);
    ws.on('close', () => sockets.delete(ws));
    // Token bucket: `ingestRate` a second, bursts of twice that.
    let tokens = ingestRate * 2;
    let refilled = performance.now();
    // Batches of one connection are stored one after another, in the order they came.
    let chain: Promise<void> = Promise.resolve();
    ws.on('message', (data, isBinary) => {
      const t = performance.now();
      tokens = Math.min(ingestRate * 2, tokens + ((t - refilled) / 1000) * ingestRate);
      refilled = t;
      let msg: unknown;
      try {
        msg = parseFrame(data, isBinary);
      } catch (e) {
        return replyError(ctx, ws, e);
      }
      const ids = typeof msg === 'object' && msg !== null ? (msg as { run?: unknown; seq?: unknown }) : {};
      const extra = {
        ...(typeof ids.run === 'string' && ids.run.length <= 200 ? { run: ids.run } : {}),
        ...(Number.isSafeInteger(ids.seq) ? { seq: ids.seq as number } : {}),
      };
      if (tokens < 1) return replyError(ctx, ws, new TidemarkError('TIDEMARK_ERR_RATE_LIMITED', `More than ${ingestRate} batches a second on this connection; send it again shortly.`), extra);
      tokens -= 1;
      if (!validateBatch(msg)) {
        const why = validateBatch.errors?.[0];
        return replyError(ctx, ws, new TidemarkError('TIDEMARK_ERR_MESSAGE_INVALID', `Not a v1 batch message: ${why?.instancePath || '(message)'} ${why?.message ?? ''}.`), extra);
      }
      const batch = msg;
      chain = chain.then(async () => {
        try {
          const { duplicate } = await store.appendBatch(batch.run, batch.seq, batch.records as SinkRecord[]);
          if (duplicate) counters.duplicateBatches++;
          else {
            counters.batchesIngested++;
            counters.pointsIngested += countPoints(batch.records as SinkRecord[]);
          }
          const ack: IngestReply = { v: 1, type: 'ack', run: batch.run, seq: batch.seq, duplicate };
          if (ws.readyState === ws.OPEN) ws.send(encodeJson(ack));
          if (!duplicate) watcher.nudge();
        } catch (e) {
          replyError(ctx, ws, e, extra);
        }
      });
    });
    ws.on('error', () => ws.terminate());
  };

  return {
    accept,
    close: () => {
      for (const ws of sockets) ws.terminate();
    },
  };
}

/** Numeric values in the windows of a batch: what `/metrics` counts as points ingested. */
function countPoints(records: readonly SinkRecord[]): number {
  let n = 0;
  for (const r of records) if (r.type === 'window') n += windowPoints(r.window);
  return n;
}
