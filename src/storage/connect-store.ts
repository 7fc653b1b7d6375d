/**
 * Which store an address names, opened behind the asynchronous interface: `postgres://` (or
 * `postgresql://`) is a PostgreSQL database, anything else a SQLite file (`:memory:` a private one).
 * The CLI's --db, `serve`, TIDEMARK_DB and monitor()'s `store` all resolve through here.
 */
import type { AsyncStore } from './async-store.js';
import { asAsyncStore } from './async-store.js';
import { isPostgresUrl } from './store-url.js';

export { isPostgresUrl };

export interface ConnectOptions {
  /** Open for reading only. Default false. */
  readonly?: boolean;
  /** A `running` run whose heartbeat is older than this many ms reads as `interrupted`. Default 30000. */
  staleAfterMs?: number;
  /** The clock (tests inject one). Default Date.now. */
  now?: () => number;
}

/**
 * Opens the store at `address`. A PostgreSQL URL may name the schema its tables live in with a `schema`
 * query parameter (`postgres://host/db?schema=team_a`; default `tidemark`).
 */
export async function connectStore(address: string, options: ConnectOptions = {}): Promise<AsyncStore> {
  // Each backend's driver is loaded when first asked for: a monitor writing to memory, a file of JSON
  // Lines or a server never loads better-sqlite3 or pg.
  if (isPostgresUrl(address)) {
    const { openPostgresStore } = await import('./postgres-store.js');
    const url = new URL(address);
    const schema = url.searchParams.get('schema');
    url.searchParams.delete('schema');
    return openPostgresStore(url.toString(), { ...options, ...(schema !== null ? { schema } : {}) });
  }
  const { openStore } = await import('./sqlite-store.js');
  return asAsyncStore(openStore(address, options));
}
