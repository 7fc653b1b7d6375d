/**
 * The tidemark server, built apart from `listen` so tests drive it in-process: the HTTP API (fastify, a
 * JSON schema per route), the live stream for viewers and the ingest endpoint for remote writers (ws, on
 * the same HTTP server), and `/metrics` in the OpenMetrics text format. This module takes the options, sets
 * the rules every request shares (token, CORS, errors) and assembles the parts: api-routes.ts,
 * page-routes.ts and sockets.ts (ingest-socket.ts, live-socket.ts).
 */
import Fastify, { type FastifyInstance, type FastifyReply, type FastifyRequest } from 'fastify';
import { TidemarkError, TidemarkTypeError } from '../errors.js';
import { checkOptions, type OptionSchema } from '../option-check.js';
import { MAX_FRAME_BYTES } from '../protocol/messages.js';
import { toAsyncStore, type AnyStore } from '../storage/async-store.js';
import { encodeJson } from '../storage/sink.js';
import { apiRoutes } from './api-routes.js';
import { tokenMatches, tokenOf } from './auth.js';
import type { ServerContext, ServerCounters } from './context.js';
import { LiveHub } from './live.js';
import { carriesNoData, pageRoutes } from './page-routes.js';
import { badRequest, publicError } from './public-error.js';
import { serveSockets } from './sockets.js';
import { StoreWatcher } from './watcher.js';

export type { ServerCounters } from './context.js';
// The icon is drawn in page-routes.ts; tests compare the page's inline icon with it.
export { FAVICON_SVG } from './page-routes.js';

export interface ServerOptions {
  /** The store to serve and to write ingested runs into (opened writable). */
  store: AnyStore;
  /** Required on every API request, live and ingest connection when set (`Authorization: Bearer T` or `?token=T`). Default none. */
  token?: string | null;
  /** An origin allowed to call the API from a browser (CORS) and open the live stream; `'*'` for any. Default none. */
  cors?: string | null;
  /** Largest HTTP request body, bytes. Default 1 MiB. */
  bodyLimit?: number;
  /** Largest WebSocket message, bytes. Default 4 MiB. */
  maxFrameBytes?: number;
  /** Batches per second one ingest connection may send (bursts of twice that). Default 200. */
  ingestRate?: number;
  /** How often the store is polled for runs written by other processes, ms. Default 250. */
  pollMs?: number;
  /** Ping interval for live viewers; one missed pong ends the connection. Default 15000. */
  heartbeatMs?: number;
  /** Bytes buffered for a viewer beyond which its messages are dropped (it gets a `gap`). Default 1 MiB. */
  viewerBufferBytes?: number;
  /** /metrics shows running runs and those that ended within this many ms. Default one hour. */
  recentMs?: number;
  /** The page at `/`. Default: a short placeholder. */
  page?: string;
  /** Told about internal failures (store errors, bugs); clients only see a code. Default console.error. */
  onError?: (e: unknown) => void;
  /** Clock, for tests. */
  now?: () => number;
}

export interface TidemarkServer {
  app: FastifyInstance;
  counters: ServerCounters;
  hub: LiveHub;
  /** Stops the live stream, the ingest connections and the HTTP server (the store stays open). */
  close(): Promise<void>;
}

/** Names, types and ranges of the server's options (the store is checked by its own type). */
export const SERVER_RULES: OptionSchema = Object.freeze({
  store: { type: 'any' },
  token: { type: 'string', nonEmpty: true, nullable: true },
  cors: { type: 'string', nonEmpty: true, nullable: true },
  bodyLimit: { type: 'number', integer: true, min: 1024, max: 2 ** 31 - 1 },
  maxFrameBytes: { type: 'number', integer: true, min: 1024, max: 2 ** 31 - 1 },
  ingestRate: { type: 'number', above: 0 },
  pollMs: { type: 'number', integer: true, min: 1, max: 2 ** 31 - 1 },
  heartbeatMs: { type: 'number', integer: true, min: 10, max: 2 ** 31 - 1 },
  viewerBufferBytes: { type: 'number', integer: true, min: 1024 },
  recentMs: { type: 'number', min: 0 },
  page: { type: 'string' },
  onError: { type: 'function' },
  now: { type: 'function' },
});

/** Builds the server without listening. Call `app.listen()` (or use `startServer`) to serve. */
export async function buildServer(options: ServerOptions): Promise<TidemarkServer> {
  checkOptions(options, SERVER_RULES, {}, { owner: 'buildServer' });
  if (options.store === null || typeof options.store !== 'object' || typeof (options.store as { runs?: unknown }).runs !== 'function') {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', "Option 'store' of buildServer must be a Store (openStore(path), or connectStore(address)).");
  }
  const store = toAsyncStore(options.store);
  const token = options.token ?? null;
  const cors = options.cors ?? null;
  const maxFrame = options.maxFrameBytes ?? MAX_FRAME_BYTES;
  const ingestRate = options.ingestRate ?? 200;
  const now = options.now ?? Date.now;
  const onError = options.onError ?? ((e: unknown) => console.error('tidemark serve:', e));
  const counters: ServerCounters = { pointsIngested: 0, batchesIngested: 0, duplicateBatches: 0, rejected: new Map() };
  const reject = (code: string): void => {
    counters.rejected.set(code, (counters.rejected.get(code) ?? 0) + 1);
  };

  const sendError = (reply: FastifyReply, e: unknown): FastifyReply => {
    const p = publicError(e);
    if (p.code === 'TIDEMARK_ERR_INTERNAL' || p.status >= 500) onError(e);
    reject(p.code);
    return reply.code(p.status).type('application/json').send(encodeJson({ error: { code: p.code, message: p.message } }));
  };

  const app = Fastify({
    // Errors of the router itself (an over-long or malformed URL) get our codes too.
    frameworkErrors: (error, _req, reply) => {
      sendError(reply, badRequest(`The request URL could not be read (${error.code === 'FST_ERR_MAX_PARAM_LENGTH' ? 'a path segment is too long' : 'malformed'}).`));
    },
    logger: false,
    bodyLimit: options.bodyLimit ?? 1024 * 1024,
    // Unknown query parameters are refused, not silently ignored: a typo should say so.
    ajv: { customOptions: { removeAdditional: false, coerceTypes: true, allErrors: false } },
  });
  app.setReplySerializer((payload) => encodeJson(payload));

  const hub = new LiveHub({ bufferLimit: options.viewerBufferBytes ?? 1024 * 1024, heartbeatMs: options.heartbeatMs ?? 15_000 });
  const watcher = new StoreWatcher(store, hub, { intervalMs: options.pollMs ?? 250, onError });

  app.setErrorHandler((e: Error & { validation?: unknown; statusCode?: number; code?: string }, _req, reply) => {
    if (e.validation !== undefined) return sendError(reply, badRequest(`${e.message}.`));
    if (e.statusCode === 413 || e.code === 'FST_ERR_CTP_BODY_TOO_LARGE') {
      return sendError(reply, new TidemarkError('TIDEMARK_ERR_PAYLOAD_TOO_LARGE', 'The request body is over the size limit.'));
    }
    if (e.statusCode !== undefined && e.statusCode >= 400 && e.statusCode < 500 && !(e instanceof TidemarkError)) {
      return sendError(reply, badRequest('The request could not be read.'));
    }
    return sendError(reply, e);
  });
  app.setNotFoundHandler((req, reply) => sendError(reply, new TidemarkError('TIDEMARK_ERR_NOT_FOUND', `No route ${req.method} ${req.url.split('?')[0]}.`)));

  app.addHook('onRequest', async (req: FastifyRequest, reply: FastifyReply) => {
    if (cors !== null) {
      reply.header('access-control-allow-origin', cors);
      reply.header('vary', 'Origin');
    }
    const path = req.url.split('?')[0]!;
    // The health check, the page and its bundle (/static/…) carry no data; everything else needs the token.
    if (token === null || carriesNoData(path)) return;
    if (!tokenMatches(token, tokenOf(req.raw))) {
      await sendError(reply, new TidemarkError('TIDEMARK_ERR_UNAUTHORIZED', 'This server needs a token: send Authorization: Bearer <token> or ?token=<token>.'));
    }
  });

  const ctx: ServerContext = { store, hub, watcher, counters, now, onError, reject, sendError };
  await app.register(pageRoutes, { ctx, page: options.page });
  await app.register(apiRoutes, { ctx, recentMs: options.recentMs ?? 3_600_000 });
  const sockets = serveSockets(app.server, ctx, { token, cors, maxFrameBytes: maxFrame, ingestRate });

  // Everything the server runs besides fastify stops inside fastify's own lifecycle, so `app.close()` is the one
  // teardown: the watcher stops polling before the caller can close the store.
  app.addHook('preClose', async () => {
    await watcher.stop();
    hub.close();
    sockets.close();
  });

  return {
    app,
    counters,
    hub,
    close: () => app.close(),
  };
}
