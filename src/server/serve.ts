/**
 * Starting the server: safe defaults first (loopback unless a token is set), then listen. Used by
 * `tidemark serve` and by `monitor(model, { serve: port })`.
 */
import { TidemarkError, TidemarkRangeError } from '../errors.js';
import { checkOptions, type OptionSchema } from '../option-check.js';
import { toAsyncStore, type AnyStore } from '../storage/async-store.js';
import { connectStore } from '../storage/connect-store.js';
import { buildServer, SERVER_RULES, type ServerOptions, type TidemarkServer } from './app.js';
import { isLoopback } from './auth.js';

export const DEFAULT_PORT = 7341;
export const DEFAULT_HOST = '127.0.0.1';

export interface StartOptions extends Omit<ServerOptions, 'store'> {
  /**
   * A store to serve; or `db`, a SQLite path or postgres:// URL the server opens (and closes). Default
   * `$TIDEMARK_DB` or tidemark.db.
   */
  store?: AnyStore;
  db?: string;
  /** Default 7341; 0 picks a free port. */
  port?: number;
  /** Default 127.0.0.1. Any other address needs `token`, or `insecure`. */
  host?: string;
  /** Listen beyond loopback without a token. Default false. */
  insecure?: boolean;
  /** Told about the insecure choice. Default console.warn. */
  onWarning?: (message: string) => void;
}

export interface RunningServer {
  /** Base URL, e.g. http://127.0.0.1:7341 */
  url: string;
  host: string;
  port: number;
  server: TidemarkServer;
  close(): Promise<void>;
}

const START_RULES: OptionSchema = Object.freeze({
  ...SERVER_RULES,
  db: { type: 'string', nonEmpty: true },
  port: { type: 'number', integer: true, min: 0, max: 65535 },
  host: { type: 'string', nonEmpty: true },
  insecure: { type: 'boolean' },
  onWarning: { type: 'function' },
});

export async function startServer(options: StartOptions = {}): Promise<RunningServer> {
  checkOptions(options, START_RULES, {}, { owner: 'startServer' });
  const host = options.host ?? DEFAULT_HOST;
  const port = options.port ?? DEFAULT_PORT;
  const token = options.token ?? null;
  if (token !== null && token.length < 8) {
    throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', 'The token must be at least 8 characters long; a short one is easy to guess.');
  }
  if (!isLoopback(host) && token === null) {
    if (options.insecure !== true) {
      throw new TidemarkError(
        'TIDEMARK_ERR_SERVE_UNSAFE',
        `Refusing to listen on ${host} without a token: anyone who can reach this machine could read and write runs. Add --token T (or set TIDEMARK_TOKEN), or --insecure if the network is yours alone.`,
      );
    }
    (options.onWarning ?? ((m: string) => console.warn(m)))(
      `tidemark serve: listening on ${host} without a token (--insecure): anyone who can reach this machine can read and write runs.`,
    );
  }
  const owned = options.store === undefined;
  const store = options.store !== undefined ? toAsyncStore(options.store) : await connectStore(options.db ?? process.env.TIDEMARK_DB ?? 'tidemark.db');
  let built: TidemarkServer | null = null;
  try {
    const { db: _db, port: _port, host: _host, insecure: _insecure, onWarning: _onWarning, ...serverOptions } = options;
    built = await buildServer({ ...serverOptions, store, token });
    await built.app.listen({ host, port });
  } catch (e) {
    if (built !== null) await built.close().catch(() => {});
    if (owned) await store.close();
    const code = (e as { code?: string }).code;
    if (code === 'EADDRINUSE' || code === 'EACCES' || code === 'EADDRNOTAVAIL') {
      const what =
        code === 'EADDRINUSE'
          ? 'something else is listening there. Pick another port (--port), or stop what is using it'
          : code === 'EACCES'
            ? 'no permission: ports below 1024 need privileges. Pick a port of 1024 or more'
            : `${host} is not an address of this machine. Use 127.0.0.1 (the default), or one of this machine's addresses`;
      throw new TidemarkError('TIDEMARK_ERR_SERVE_LISTEN', `Cannot listen on ${host}:${port} (${code}): ${what}.`, { cause: e });
    }
    throw e;
  }
  const server = built;
  const address = server.app.server.address();
  const actualPort = typeof address === 'object' && address !== null ? address.port : port;
  const shownHost = host.includes(':') ? `[${host}]` : host;
  let closed = false;
  return {
    url: `http://${shownHost}:${actualPort}`,
    host,
    port: actualPort,
    server,
    close: async () => {
      if (closed) return;
      closed = true;
      await server.close();
      if (owned) await store.close();
    },
  };
}
