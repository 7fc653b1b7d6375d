/**
 * What a `store` string names, decided in one place for both the option check (before training) and the
 * opening of the sink: 'memory', a tidemark server (ws(s):// for ingest, or the http(s):// address `serve`
 * prints), a PostgreSQL database (postgres://), a JSON Lines file (*.jsonl) or a SQLite file. Any other
 * URL is refused, so a URL never becomes a folder named after its scheme.
 */
import { TidemarkTypeError } from '../errors.js';
import { isPostgresUrl } from './store-url.js';

export type SinkAddress =
  | { kind: 'memory' }
  | { kind: 'server'; url: string }
  | { kind: 'postgres'; url: string }
  | { kind: 'jsonl'; path: string }
  | { kind: 'sqlite'; path: string };

/** A tidemark server's address: ws(s):// for ingest, or the http(s):// address `serve` prints. */
export function isServerUrl(store: string): boolean {
  return /^(wss?|https?):\/\//i.test(store);
}

/** @throws TidemarkTypeError TIDEMARK_ERR_OPTION_INVALID for the empty string and for URLs of other schemes. */
export function parseSinkAddress(store: string): SinkAddress {
  if (store.length === 0) {
    throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', "Option 'store' must be a file path, 'memory', a server's address or a postgres:// URL; received ''.");
  }
  if (store === 'memory') return { kind: 'memory' };
  if (isServerUrl(store)) return { kind: 'server', url: store };
  if (isPostgresUrl(store)) return { kind: 'postgres', url: store };
  const scheme = /^([a-z][a-z0-9+.-]*):\/\//i.exec(store);
  if (scheme !== null) {
    throw new TidemarkTypeError(
      'TIDEMARK_ERR_OPTION_INVALID',
      `Option 'store' is a ${scheme[1]}:// URL, which tidemark cannot write to. Use a server's address (http://, https://, ws:// or wss://, as 'tidemark serve' prints it), a postgres:// database URL, a SQLite file path, a .jsonl path, or 'memory'.`,
    );
  }
  return store.endsWith('.jsonl') ? { kind: 'jsonl', path: store } : { kind: 'sqlite', path: store };
}
