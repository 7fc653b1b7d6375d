/**
 * The tidemark server, built apart from `listen` so tests drive it in-process: the HTTP API (fastify, a
 * JSON schema per route), the live stream for viewers and the ingest endpoint for remote writers (ws, on
 * the same HTTP server), and `/metrics` in the OpenMetrics text format.
 */
import { existsSync } from 'node:fs';
import { readFile, stat } from 'node:fs/promises';
import type { IncomingMessage } from 'node:http';
import { resolve as resolvePath, sep } from 'node:path';
import { fileURLToPath } from 'node:url';
import type { Duplex } from 'node:stream';
import { Ajv } from 'ajv';
import Fastify, { type FastifyInstance, type FastifyReply, type FastifyRequest } from 'fastify';
import { WebSocketServer, type RawData, type WebSocket } from 'ws';
import { codeOf, ERROR_CODES, TidemarkError, TidemarkTypeError, type ErrorCode } from '../errors.js';
import { checkOptions, closestName, type OptionSchema } from '../option-check.js';
import { MAX_FRAME_BYTES, type BackfillMessage, type ErrorMessage, type IngestReply } from '../protocol/messages.js';
import { windowPoints } from '../protocol/points.js';
import { markerKey, type SinkRecord } from '../protocol/records.js';
import { toAsyncStore, type AnyStore } from '../storage/async-store.js';
import { exportRun, type ExportFormat } from '../storage/export.js';
import { decodeJson, encodeJson } from '../storage/sink.js';
import type { RunFilter, SeriesKey, WindowQuery } from '../storage/store.js';
import { originAllowed, tokenMatches, tokenOf } from './auth.js';
import { LiveHub, type Viewer } from './live.js';
import { metricsText } from './metrics.js';
import { batchSchema, viewerSchema } from './schemas.js';
import { StoreWatcher, summaryOf } from './watcher.js';

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

export interface ServerCounters {
  /** Numeric values stored from ingested windows. */
  pointsIngested: number;
  batchesIngested: number;
  duplicateBatches: number;
  /** Messages and requests refused, by error code. */
  rejected: Map<string, number>;
}

export interface TidemarkServer {
  app: FastifyInstance;
  counters: ServerCounters;
  hub: LiveHub;
  /** Stops the live stream, the ingest connections and the HTTP server (the store stays open). */
  close(): Promise<void>;
}

const STATUS: Partial<Record<ErrorCode, number>> = {
  TIDEMARK_ERR_UNAUTHORIZED: 401,
  TIDEMARK_ERR_REQUEST_INVALID: 400,
  TIDEMARK_ERR_OPTION_INVALID: 400,
  TIDEMARK_ERR_OPTION_UNKNOWN: 400,
  TIDEMARK_ERR_RUN_NOT_FOUND: 404,
  TIDEMARK_ERR_NOT_FOUND: 404,
  TIDEMARK_ERR_RUN_AMBIGUOUS: 409,
  TIDEMARK_ERR_PAYLOAD_TOO_LARGE: 413,
  TIDEMARK_ERR_RATE_LIMITED: 429,
};

/** Codes whose message may be shown as it is: it names the client's input, never the database's state. */
const CLIENT_FACING: ReadonlySet<string> = new Set([
  'TIDEMARK_ERR_REQUEST_INVALID',
  'TIDEMARK_ERR_OPTION_INVALID',
  'TIDEMARK_ERR_OPTION_UNKNOWN',
  'TIDEMARK_ERR_RUN_NOT_FOUND',
  'TIDEMARK_ERR_RUN_AMBIGUOUS',
  'TIDEMARK_ERR_RECORD_INVALID',
  'TIDEMARK_ERR_MESSAGE_INVALID',
  'TIDEMARK_ERR_PAYLOAD_TOO_LARGE',
  'TIDEMARK_ERR_RATE_LIMITED',
  'TIDEMARK_ERR_UNAUTHORIZED',
  'TIDEMARK_ERR_NOT_FOUND',
]);

/** What a client is told about an error: a stable code and a message that leaks nothing of the store. */
export function publicError(e: unknown): { code: string; message: string; status: number; retry: boolean } {
  const known = codeOf(e);
  if (known !== null) {
    const message = CLIENT_FACING.has(known) ? (e as Error).message : ERROR_CODES[known];
    const retry = known === 'TIDEMARK_ERR_STORE_WRITE' || known === 'TIDEMARK_ERR_STORE_READ' || known === 'TIDEMARK_ERR_RATE_LIMITED';
    return { code: known, message, status: STATUS[known] ?? (retry ? 503 : 500), retry };
  }
  return { code: 'TIDEMARK_ERR_INTERNAL', message: ERROR_CODES.TIDEMARK_ERR_INTERNAL, status: 500, retry: true };
}

const PLACEHOLDER = `<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>tidemark</title></head>
<body><h1>tidemark</h1><p>The server is running. The live page comes with a later version; meanwhile the
runs are at <a href="api/runs">api/runs</a> and the metrics at <a href="metrics">metrics</a>.</p></body></html>
`;

/** The built page (`npm run build` bundles src/web here): dist/web, from src/server as from dist/server. */
const WEB_DIR = resolvePath(fileURLToPath(new URL('../../dist/web/', import.meta.url)));

const STATIC_TYPES: Record<string, string> = {
  '.js': 'text/javascript; charset=utf-8',
  '.css': 'text/css; charset=utf-8',
  '.map': 'application/json; charset=utf-8',
  '.html': 'text/html; charset=utf-8',
  '.svg': 'image/svg+xml',
  '.png': 'image/png',
};

/** A file of the page's bundle: only a regular file inside `${WEB_DIR}/static`, never a path that resolves out of it. */
async function staticFile(name: string): Promise<{ body: Buffer; type: string } | null> {
  const dir = resolvePath(WEB_DIR, 'static');
  const file = resolvePath(dir, name);
  if (!file.startsWith(dir + sep) || name.includes('\0')) return null;
  const type = STATIC_TYPES[file.slice(file.lastIndexOf('.'))];
  if (type === undefined) return null;
  try {
    if (!(await stat(file)).isFile()) return null;
    return { body: await readFile(file), type };
  } catch {
    return null;
  }
}

/** A wave under a dashed line: the tide and its mark. */
export const FAVICON_SVG =
  "<svg xmlns='http://www.w3.org/2000/svg' viewBox='0 0 16 16'><path d='M1 10c2-3 4-3 7 0s5 3 7 0' fill='none' stroke='#0b6e75' stroke-width='2'/><path d='M2 4h12' stroke='#889' stroke-width='1.5' stroke-dasharray='2 2'/></svg>";

const bad = (message: string): TidemarkError => new TidemarkError('TIDEMARK_ERR_REQUEST_INVALID', message);

/** Refuses a metric, or a metric and layer, that the run has no series for (a run with no series yet: nothing to say). */
function checkSeriesKey(keys: readonly SeriesKey[], metric: string, layer: string | null): void {
  if (keys.length === 0) return;
  if (!keys.some((k) => k.metric === metric)) {
    const metrics = [...new Set(keys.map((k) => k.metric))].sort();
    const best = closestName(metric, metrics);
    throw bad(`Query parameter 'metric': this run has no series '${metric}'.${best !== null ? ` Did you mean '${best}'?` : ''} Its metrics: ${metrics.join(', ')}.`);
  }
  if (!keys.some((k) => k.metric === metric && k.layer === layer)) {
    const layers = keys.filter((k) => k.metric === metric).map((k) => (k.layer === null ? '(none: the network)' : k.layer));
    throw bad(`Query parameter 'layer': '${metric}' has no series for ${layer === null ? 'the network' : `layer '${layer}'`}. It has: ${layers.join(', ')}.`);
  }
}

/** `from` after `to` selects nothing by construction: a caller's mistake, said as such. */
function checkRange(from: number | undefined, to: number | undefined): void {
  if (from !== undefined && to !== undefined && from > to) {
    throw bad(`Query parameters 'from' (${from}) and 'to' (${to}): from must not be greater than to.`);
  }
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
      sendError(reply, bad(`The request URL could not be read (${error.code === 'FST_ERR_MAX_PARAM_LENGTH' ? 'a path segment is too long' : 'malformed'}).`));
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
    if (e.validation !== undefined) return sendError(reply, bad(`${e.message}.`));
    if (e.statusCode === 413 || e.code === 'FST_ERR_CTP_BODY_TOO_LARGE') {
      return sendError(reply, new TidemarkError('TIDEMARK_ERR_PAYLOAD_TOO_LARGE', 'The request body is over the size limit.'));
    }
    if (e.statusCode !== undefined && e.statusCode >= 400 && e.statusCode < 500 && !(e instanceof TidemarkError)) {
      return sendError(reply, bad('The request could not be read.'));
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
    if (token === null || path === '/healthz' || path === '/' || path === '/favicon.ico' || path.startsWith('/static/')) return;
    if (!tokenMatches(token, tokenOf(req.raw))) {
      await sendError(reply, new TidemarkError('TIDEMARK_ERR_UNAUTHORIZED', 'This server needs a token: send Authorization: Bearer <token> or ?token=<token>.'));
    }
  });

  const idParams = { type: 'object', properties: { id: { type: 'string', minLength: 1, maxLength: 200 } }, required: ['id'] } as const;
  const queryOf = (props: Record<string, unknown>) => ({ type: 'object', properties: { token: { type: 'string' }, ...props }, additionalProperties: false });

  app.get('/healthz', async () => ({ status: 'ok' }));
  // The page names its icon inline; browsers that ask for /favicon.ico anyway get the same drawing, not a 404.
  app.get('/favicon.ico', async (_req, reply) => reply.type('image/svg+xml').header('cache-control', 'max-age=86400').send(FAVICON_SVG));

  // The page: `options.page` when given, else the built page in dist/web, else (not built) the placeholder.
  const builtPage = existsSync(resolvePath(WEB_DIR, 'index.html')) ? resolvePath(WEB_DIR, 'index.html') : null;
  app.get('/', async (_req, reply) => {
    const page = options.page ?? (builtPage === null ? PLACEHOLDER : await readFile(builtPage, 'utf8').catch(() => PLACEHOLDER));
    return reply.type('text/html; charset=utf-8').header('cache-control', 'no-cache').send(page);
  });
  app.get('/static/*', async (req, reply) => {
    const name = (req.params as Record<string, string | undefined>)['*'] ?? '';
    const found = await staticFile(name);
    if (found === null) return sendError(reply, new TidemarkError('TIDEMARK_ERR_NOT_FOUND', `No file static/${name.slice(0, 100)}.`));
    return reply.type(found.type).header('cache-control', 'no-cache').send(found.body);
  });

  app.get(
    '/api/runs',
    {
      schema: {
        querystring: queryOf({
          name: { type: 'string', maxLength: 1000 },
          group: { type: 'string', maxLength: 1000 },
          tag: { type: 'string', maxLength: 1000, pattern: '^[^=]+=.*$' },
          status: { type: 'string', enum: ['running', 'finished', 'failed', 'interrupted'] },
          limit: { type: 'integer', minimum: 1, maximum: 10000 },
        }),
      },
    },
    async (req) => {
      const q = req.query as { name?: string; group?: string; tag?: string; status?: RunFilter['status']; limit?: number };
      const filter: RunFilter = {};
      if (q.name !== undefined) filter.name = q.name;
      if (q.group !== undefined) filter.group = q.group;
      if (q.status !== undefined) filter.status = q.status;
      if (q.limit !== undefined) filter.limit = q.limit;
      if (q.tag !== undefined) {
        const i = q.tag.indexOf('=');
        filter.tags = { [q.tag.slice(0, i)]: q.tag.slice(i + 1) };
      }
      return store.runs(filter);
    },
  );

  app.get('/api/runs/:id', { schema: { params: idParams, querystring: queryOf({}) } }, async (req) => await store.resolveRun((req.params as { id: string }).id));

  app.get(
    '/api/runs/:id/series',
    {
      schema: {
        params: idParams,
        querystring: {
          ...queryOf({
            metric: { type: 'string', minLength: 1, maxLength: 200 },
            layer: { type: 'string', minLength: 1, maxLength: 1000 },
            from: { type: 'number' },
            to: { type: 'number' },
            points: { type: 'integer', minimum: 2, maximum: 100000 },
          }),
          required: ['metric'],
        },
      },
    },
    async (req) => {
      const run = await store.resolveRun((req.params as { id: string }).id);
      const q = req.query as { metric: string; layer?: string; from?: number; to?: number; points?: number };
      checkRange(q.from, q.to);
      const points = await store.series(run.id, q.metric, {
        layer: q.layer ?? null,
        ...(q.from !== undefined ? { from: q.from } : {}),
        ...(q.to !== undefined ? { to: q.to } : {}),
        ...(q.points !== undefined ? { points: q.points } : {}),
      });
      // Only an empty answer needs the run's series listed: to tell an unknown metric or layer (a caller's
      // mistake, 400 per docs/protocol.md) from a known series with no points in the range.
      if (points.length === 0) checkSeriesKey(await store.seriesKeys(run.id), q.metric, q.layer ?? null);
      return { run: run.id, metric: q.metric, layer: q.layer ?? null, points };
    },
  );

  app.get(
    '/api/runs/:id/windows',
    {
      schema: {
        params: idParams,
        querystring: queryOf({
          after: { type: 'number' },
          from: { type: 'number' },
          to: { type: 'number' },
          points: { type: 'integer', minimum: 2, maximum: 100000 },
          variables: { type: 'boolean' },
        }),
      },
    },
    async (req) => {
      const run = await store.resolveRun((req.params as { id: string }).id);
      const q = req.query as { after?: number; from?: number; to?: number; points?: number; variables?: boolean };
      checkRange(q.from, q.to);
      const query: WindowQuery = {};
      for (const key of ['after', 'from', 'to', 'points'] as const) if (q[key] !== undefined) query[key] = q[key];
      if (q.variables !== undefined) query.variables = q.variables;
      return await store.windows(run.id, query);
    },
  );

  app.get('/api/runs/:id/markers', { schema: { params: idParams, querystring: queryOf({}) } }, async (req) => {
    const run = await store.resolveRun((req.params as { id: string }).id);
    return await store.markers(run.id);
  });

  app.get(
    '/api/runs/:id/export',
    { schema: { params: idParams, querystring: { ...queryOf({ format: { type: 'string', enum: ['csv', 'jsonl'] } }), required: ['format'] } } },
    async (req, reply) => {
      const run = await store.resolveRun((req.params as { id: string }).id);
      const format = (req.query as { format: ExportFormat }).format;
      const body = await exportRun(store, run.id, format);
      const safeName = run.name.replace(/[^A-Za-z0-9._-]+/g, '_').slice(0, 100) || run.id;
      return reply
        .type(format === 'csv' ? 'text/csv; charset=utf-8' : 'application/jsonl; charset=utf-8')
        .header('content-disposition', `attachment; filename="${safeName}.${format}"`)
        .send(body);
    },
  );

  app.get('/metrics', { schema: { querystring: queryOf({}) } }, async (req, reply) => {
    const ctx = { now: now(), recentMs: options.recentMs ?? 3_600_000, counters, viewers: hub.size };
    const { contentType, text } = await metricsText(store, ctx, req.headers.accept ?? '');
    return reply.type(contentType).send(text);
  });

  // --------------------------------------------------------------------------------------------
  // WebSocket: /live and /ingest on the same HTTP server

  const wss = new WebSocketServer({ noServer: true, maxPayload: maxFrame });
  const ingestSockets = new Set<WebSocket>();
  const refuseUpgrade = (socket: Duplex, status: number, code: string): void => {
    reject(code);
    const body = encodeJson({ error: { code, message: ERROR_CODES[code as ErrorCode] } });
    socket.end(`HTTP/1.1 ${status} ${status === 401 ? 'Unauthorized' : status === 403 ? 'Forbidden' : 'Not Found'}\r\ncontent-type: application/json\r\ncontent-length: ${Buffer.byteLength(body)}\r\nconnection: close\r\n\r\n${body}`);
  };
  app.server.on('upgrade', (req: IncomingMessage, socket: Duplex, head: Buffer) => {
    // Node hands an upgrading socket over without its own error handler: a client that resets the connection
    // (while a refusal is sent, or before ws takes the socket) would otherwise crash the server.
    socket.on('error', () => socket.destroy());
    const path = (req.url ?? '').split('?')[0];
    if (path !== '/live' && path !== '/ingest') return refuseUpgrade(socket, 404, 'TIDEMARK_ERR_NOT_FOUND');
    if (token !== null && !tokenMatches(token, tokenOf(req))) return refuseUpgrade(socket, 401, 'TIDEMARK_ERR_UNAUTHORIZED');
    if (!originAllowed(req, cors)) return refuseUpgrade(socket, 403, 'TIDEMARK_ERR_UNAUTHORIZED');
    wss.handleUpgrade(req, socket, head, (ws) => (path === '/live' ? onViewer(ws) : onWriter(ws)));
  });

  const validateBatch = batchSchema(new Ajv({ allErrors: false }));
  const validateViewer = viewerSchema(new Ajv({ allErrors: false }));

  /** Parses one text frame; refuses binary frames and the prototype-polluting key outright. */
  const parse = (data: RawData, isBinary: boolean): unknown => {
    if (isBinary) throw new TidemarkError('TIDEMARK_ERR_MESSAGE_INVALID', 'Messages are JSON text frames; received a binary frame.');
    const text = Buffer.isBuffer(data) ? data.toString('utf8') : Array.isArray(data) ? Buffer.concat(data).toString('utf8') : Buffer.from(data).toString('utf8');
    if (text.includes('"__proto__"')) throw new TidemarkError('TIDEMARK_ERR_MESSAGE_INVALID', 'The key "__proto__" is not allowed in messages.');
    try {
      return decodeJson(text);
    } catch {
      throw new TidemarkError('TIDEMARK_ERR_MESSAGE_INVALID', 'The message is not valid JSON.');
    }
  };

  const replyError = (ws: WebSocket, e: unknown, extra: { run?: string; seq?: number } = {}): void => {
    const p = publicError(e);
    if (p.code === 'TIDEMARK_ERR_INTERNAL') onError(e);
    reject(p.code);
    const message: ErrorMessage = { v: 1, type: 'error', code: p.code, message: p.message, retry: p.retry, ...extra };
    if (ws.readyState === ws.OPEN) ws.send(encodeJson(message));
  };

  const onWriter = (ws: WebSocket): void => {
    ingestSockets.add(ws);
    ws.on('close', () => ingestSockets.delete(ws));
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
        msg = parse(data, isBinary);
      } catch (e) {
        return replyError(ws, e);
      }
      const ids = typeof msg === 'object' && msg !== null ? (msg as { run?: unknown; seq?: unknown }) : {};
      const extra = {
        ...(typeof ids.run === 'string' && ids.run.length <= 200 ? { run: ids.run } : {}),
        ...(Number.isSafeInteger(ids.seq) ? { seq: ids.seq as number } : {}),
      };
      if (tokens < 1) return replyError(ws, new TidemarkError('TIDEMARK_ERR_RATE_LIMITED', `More than ${ingestRate} batches a second on this connection; send it again shortly.`), extra);
      tokens -= 1;
      if (!validateBatch(msg)) {
        const why = validateBatch.errors?.[0];
        return replyError(ws, new TidemarkError('TIDEMARK_ERR_MESSAGE_INVALID', `Not a v1 batch message: ${why?.instancePath || '(message)'} ${why?.message ?? ''}.`), extra);
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
          replyError(ws, e, extra);
        }
      });
    });
    ws.on('error', () => ws.terminate());
  };

  const onViewer = (ws: WebSocket): void => {
    const viewer = hub.add(ws);
    // A viewer's requests are answered in the order they came (a subscribe, then its unsubscribe).
    let chain: Promise<void> = Promise.resolve();
    ws.on('message', (data, isBinary) => {
      let msg: unknown;
      try {
        msg = parse(data, isBinary);
      } catch (e) {
        return replyError(ws, e);
      }
      if (!validateViewer(msg)) {
        const why = validateViewer.errors?.[0];
        return replyError(ws, new TidemarkError('TIDEMARK_ERR_MESSAGE_INVALID', `Not a v1 viewer message: ${why?.instancePath || '(message)'} ${why?.message ?? ''}.`));
      }
      const request = msg;
      chain = chain.then(async () => {
        try {
          if (request.type === 'subscribe-runs') {
            viewer.runsList = true;
            hub.send(viewer, { v: 1, type: 'runs', runs: (await store.runs()).map(summaryOf) });
          } else if (request.type === 'unsubscribe') {
            if (request.run === undefined) viewer.runsList = false;
            else forget(viewer, request.run);
          } else {
            await backfill(viewer, request.run, request.points ?? 500, request.after ?? null, request.variables ?? true);
          }
        } catch (e) {
          replyError(ws, e, request.type === 'subscribe' ? { run: request.run } : {});
        }
      });
    });
    ws.on('error', () => ws.terminate());
  };

  const forget = (viewer: Viewer, runId: string): void => {
    viewer.runs.delete(runId);
    viewer.lastStep.delete(runId);
    viewer.markerKeys.delete(runId);
    viewer.behind.delete(runId);
    viewer.lean.delete(runId);
  };

  const backfill = async (viewer: Viewer, ref: string, points: number, after: number | null, variables: boolean): Promise<void> => {
    const run = await store.resolveRun(ref);
    const windows = await store.windows(run.id, { points, variables, ...(after !== null ? { after } : {}) });
    const markers = await store.markers(run.id);
    const message: BackfillMessage = {
      v: 1,
      type: 'backfill',
      run: { ...summaryOf(run), config: run.config, layers: run.layers },
      windows,
      total_windows: run.windows,
      markers,
    };
    forget(viewer, run.id);
    viewer.runs.add(run.id);
    if (!variables) viewer.lean.add(run.id);
    viewer.lastStep.set(run.id, windows.at(-1)?.step ?? after);
    viewer.markerKeys.set(run.id, new Set(markers.map(markerKey)));
    if (!hub.send(viewer, message)) viewer.behind.set(run.id, after);
    // What was stored while the backfill was read (and published before this viewer followed the run) comes
    // with the next poll: the watcher reads from the earliest step its viewers have, and all markers again.
    watcher.resync(run.id);
  };

  // Everything the server runs besides fastify stops inside fastify's own lifecycle, so `app.close()` is the one
  // teardown: the watcher stops polling before the caller can close the store.
  app.addHook('preClose', async () => {
    await watcher.stop();
    hub.close();
    for (const ws of ingestSockets) ws.terminate();
    wss.close();
  });

  return {
    app,
    counters,
    hub,
    close: () => app.close(),
  };
}

/** Numeric values in the windows of a batch: what `/metrics` counts as points ingested. */
function countPoints(records: readonly SinkRecord[]): number {
  let n = 0;
  for (const r of records) if (r.type === 'window') n += windowPoints(r.window);
  return n;
}
