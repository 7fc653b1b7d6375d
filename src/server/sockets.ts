/**
 * The WebSocket endpoints on the HTTP server: an upgrade to `/live` goes to the viewers' handler, one to
 * `/ingest` to the writers', once its token and origin pass; anything else is refused with a coded answer.
 */
import type { IncomingMessage, Server } from 'node:http';
import type { Duplex } from 'node:stream';
import { WebSocketServer } from 'ws';
import { ERROR_CODES, type ErrorCode } from '../errors.js';
import { encodeJson } from '../storage/sink.js';
import { originAllowed, tokenMatches, tokenOf } from './auth.js';
import type { ServerContext } from './context.js';
import { ingestSocket } from './ingest-socket.js';
import { liveSocket } from './live-socket.js';

export interface SocketOptions {
  token: string | null;
  cors: string | null;
  /** Largest WebSocket message, bytes. */
  maxFrameBytes: number;
  /** Batches a second one ingest connection may send. */
  ingestRate: number;
}

/** Serves `/live` and `/ingest` on `server`; the returned close ends the writers' connections (the hub ends the viewers'). */
export function serveSockets(server: Server, ctx: ServerContext, options: SocketOptions): { close(): void } {
  const { token, cors } = options;
  const wss = new WebSocketServer({ noServer: true, maxPayload: options.maxFrameBytes });
  const ingest = ingestSocket(ctx, options.ingestRate);
  const onViewer = liveSocket(ctx);

  const refuseUpgrade = (socket: Duplex, status: number, code: string): void => {
    ctx.reject(code);
    const body = encodeJson({ error: { code, message: ERROR_CODES[code as ErrorCode] } });
    socket.end(`HTTP/1.1 ${status} ${status === 401 ? 'Unauthorized' : status === 403 ? 'Forbidden' : 'Not Found'}\r\ncontent-type: application/json\r\ncontent-length: ${Buffer.byteLength(body)}\r\nconnection: close\r\n\r\n${body}`);
  };
  server.on('upgrade', (req: IncomingMessage, socket: Duplex, head: Buffer) => {
    // Node hands an upgrading socket over without its own error handler: a client that resets the connection
    // (while a refusal is sent, or before ws takes the socket) would otherwise crash the server.
    socket.on('error', () => socket.destroy());
    const path = (req.url ?? '').split('?')[0];
    if (path !== '/live' && path !== '/ingest') return refuseUpgrade(socket, 404, 'TIDEMARK_ERR_NOT_FOUND');
    if (token !== null && !tokenMatches(token, tokenOf(req))) return refuseUpgrade(socket, 401, 'TIDEMARK_ERR_UNAUTHORIZED');
    if (!originAllowed(req, cors)) return refuseUpgrade(socket, 403, 'TIDEMARK_ERR_UNAUTHORIZED');
    wss.handleUpgrade(req, socket, head, (ws) => (path === '/live' ? onViewer(ws) : ingest.accept(ws)));
  });

  return {
    close: () => {
      ingest.close();
      wss.close();
    },
  };
}
