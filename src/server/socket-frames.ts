/**
 * Frames of the two WebSocket endpoints, `/ingest` and `/live`: reading one as a message, and answering a
 * refused or failed one with an `error` message.
 */
import type { RawData, WebSocket } from 'ws';
import { TidemarkError } from '../errors.js';
import type { ErrorMessage } from '../protocol/messages.js';
import { decodeJson, encodeJson } from '../storage/sink.js';
import type { ServerContext } from './context.js';
import { publicError } from './public-error.js';

/** Parses one text frame; refuses binary frames and the prototype-polluting key outright. */
export function parseFrame(data: RawData, isBinary: boolean): unknown {
  if (isBinary) throw new TidemarkError('TIDEMARK_ERR_MESSAGE_INVALID', 'Messages are JSON text frames; received a binary frame.');
  const text = Buffer.isBuffer(data) ? data.toString('utf8') : Array.isArray(data) ? Buffer.concat(data).toString('utf8') : Buffer.from(data).toString('utf8');
  if (text.includes('"__proto__"')) throw new TidemarkError('TIDEMARK_ERR_MESSAGE_INVALID', 'The key "__proto__" is not allowed in messages.');
  try {
    return decodeJson(text);
  } catch {
    throw new TidemarkError('TIDEMARK_ERR_MESSAGE_INVALID', 'The message is not valid JSON.');
  }
}

/** Sends the public form of an error, naming the run and batch it answers when known; counts the refusal. */
export function replyError(ctx: ServerContext, ws: WebSocket, e: unknown, extra: { run?: string; seq?: number } = {}): void {
  const p = publicError(e);
  if (p.code === 'TIDEMARK_ERR_INTERNAL') ctx.onError(e);
  ctx.reject(p.code);
  const message: ErrorMessage = { v: 1, type: 'error', code: p.code, message: p.message, retry: p.retry, ...extra };
  if (ws.readyState === ws.OPEN) ws.send(encodeJson(message));
}
