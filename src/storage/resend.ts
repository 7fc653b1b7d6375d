/**
 * The way back for a remote writer's spill file: its batches, sent again to a server as they were (same
 * run, same seq), one at a time, each waiting for its acknowledgement. The server stores a batch once per
 * (run, seq), so resending a file twice, or one the server partly has, doubles nothing.
 */
import { createReadStream } from 'node:fs';
import { createInterface } from 'node:readline';
import WebSocket from 'ws';
import { TidemarkError, TidemarkTypeError } from '../errors.js';
import { checkOptions } from '../option-check.js';
import type { BatchMessage, IngestReply } from '../protocol/messages.js';
import { parseIngestUrl } from './remote-sink.js';
import { decodeJson } from './sink.js';

export interface ResendOptions {
  /** Sent as the `token` query parameter. Default none. */
  token?: string;
  /** How long to wait for the connection and for each acknowledgement, ms. Default 10000. */
  timeoutMs?: number;
}

export interface ResendReport {
  /** Batches sent and acknowledged. */
  batches: number;
  /** Of those, batches the server already had. */
  duplicates: number;
  /** Records in the batches sent. */
  records: number;
  /** The runs the batches belong to, in file order. */
  runs: string[];
}

async function readBatches(path: string): Promise<string[]> {
  const frames: string[] = [];
  let lineNo = 0;
  try {
    const lines = createInterface({ input: createReadStream(path, 'utf8'), crlfDelay: Infinity });
    for await (const text of lines) {
      lineNo++;
      if (text.trim() === '') continue;
      let msg: Partial<BatchMessage>;
      try {
        msg = decodeJson(text) as Partial<BatchMessage>;
      } catch {
        throw new TidemarkTypeError('TIDEMARK_ERR_RECORD_INVALID', `${path}, line ${lineNo}: not JSON; a spill file holds one batch message per line.`);
      }
      if (msg.type !== 'batch' || typeof msg.run !== 'string' || !Number.isSafeInteger(msg.seq) || !Array.isArray(msg.records)) {
        throw new TidemarkTypeError(
          'TIDEMARK_ERR_RECORD_INVALID',
          `${path}, line ${lineNo}: not a batch message. resend sends a remote writer's spill file; for an export or a JSON Lines store use 'tidemark import'.`,
        );
      }
      frames.push(text);
    }
  } catch (e) {
    if (e instanceof TidemarkError || e instanceof TidemarkTypeError) throw e;
    throw new TidemarkError('TIDEMARK_ERR_FILE_READ', `resend: could not read ${JSON.stringify(path)} (${(e as Error).message}).`, { cause: e });
  }
  return frames;
}

/**
 * Sends every batch of a spill file to the server at `url` (ws(s):// or its http(s):// address).
 *
 * @throws TidemarkError TIDEMARK_ERR_REMOTE_CONNECT when the server cannot be reached or stops answering;
 *   TIDEMARK_ERR_REMOTE_REFUSED when it refuses a batch for good (nothing after it is sent);
 *   TidemarkTypeError TIDEMARK_ERR_RECORD_INVALID for a line that is not a batch message.
 */
export async function resendSpill(path: string, url: string, options: ResendOptions = {}): Promise<ResendReport> {
  const o = checkOptions<Required<Omit<ResendOptions, 'token'>> & { token?: string }>(
    options,
    { token: { type: 'string', nonEmpty: true }, timeoutMs: { type: 'number', integer: true, min: 1, max: 2 ** 31 - 1 } },
    { timeoutMs: 10_000 },
    { owner: 'resendSpill' },
  );
  const target = parseIngestUrl(url);
  if (o.token !== undefined) target.searchParams.set('token', o.token);
  const shown = new URL(target.href);
  if (shown.searchParams.has('token')) shown.searchParams.set('token', '***');
  const frames = await readBatches(path);
  const report: ResendReport = { batches: 0, duplicates: 0, records: 0, runs: [] };
  if (frames.length === 0) return report;

  const ws = new WebSocket(target.href);
  const replies: IngestReply[] = [];
  let wake: (() => void) | null = null;
  let closed: Error | null = null;
  ws.on('message', (data) => {
    try {
      replies.push(decodeJson(String(data)) as IngestReply);
    } catch {
      // A reply that is not JSON is ignored; the wait below times out if no acknowledgement follows.
    }
    wake?.();
  });
  ws.on('open', () => wake?.());
  ws.on('error', (e) => {
    closed = e;
    wake?.();
  });
  ws.on('close', () => {
    closed ??= new Error('the connection closed');
    wake?.();
  });
  const connectFailure = (why: string): TidemarkError =>
    new TidemarkError('TIDEMARK_ERR_REMOTE_CONNECT', `resend: ${shown.href} ${why}. Nothing after the last acknowledged batch was sent; run the same command again once the server is up (batches it already has are skipped).`);
  /** Resolves with what `probe` finds, waking on every socket event; throws when the socket fails or time runs out. */
  const waitFor = async <T>(probe: () => T | undefined): Promise<T> => {
    const deadline = Date.now() + o.timeoutMs;
    for (;;) {
      const found = probe();
      if (found !== undefined) return found;
      if (closed !== null) throw connectFailure(`could not be reached or closed the connection (${(closed as Error).message})`);
      const left = deadline - Date.now();
      if (left <= 0) throw connectFailure(`did not answer within ${o.timeoutMs} ms`);
      await new Promise<void>((resolve) => {
        const timer = setTimeout(resolve, left);
        wake = () => {
          clearTimeout(timer);
          resolve();
        };
      });
      wake = null;
    }
  };
  try {
    await waitFor(() => (ws.readyState === WebSocket.OPEN ? true : undefined));
    for (const frame of frames) {
      const msg = decodeJson(frame) as BatchMessage;
      let answer: IngestReply;
      // A refusal with retry (the store was busy, the rate limit) is tried again a few times after a pause.
      for (let attempt = 0; ; attempt++) {
        replies.length = 0;
        ws.send(frame);
        answer = await waitFor(() => replies.find((r) => r.seq === undefined || (r.seq === msg.seq && r.run === msg.run)));
        if (answer.type !== 'error' || !answer.retry || attempt >= 5) break;
        await new Promise((resolve) => setTimeout(resolve, 250 * 2 ** attempt));
      }
      if (answer.type === 'error') {
        throw new TidemarkError(
          'TIDEMARK_ERR_REMOTE_REFUSED',
          `resend: ${shown.href} refused batch ${msg.seq} of run ${msg.run} (${answer.code}: ${answer.message}); ${report.batches} batches before it were stored.`,
        );
      }
      report.batches++;
      if (answer.duplicate) report.duplicates++;
      report.records += msg.records.length;
      if (!report.runs.includes(msg.run)) report.runs.push(msg.run);
    }
  } finally {
    ws.removeAllListeners('close');
    ws.on('error', () => {});
    // Wait (briefly) for the closing handshake, so the server does not hold the connection after we return.
    await new Promise<void>((resolve) => {
      if (ws.readyState === WebSocket.CLOSED) return resolve();
      const timer = setTimeout(() => {
        ws.terminate();
        resolve();
      }, 1000);
      ws.once('close', () => {
        clearTimeout(timer);
        resolve();
      });
      ws.close();
    });
  }
  return report;
}
