/**
 * What either store backend does with the schema version it finds on open: refuse one newer than this code
 * knows (left untouched, so an older tidemark never damages a newer store), and refuse a read-only open of a
 * store that is empty or would need a migration (a read-only open cannot write one).
 */
import { TidemarkError } from '../errors.js';

/**
 * @param where  the start of the message ("openStore: could not open …").
 * @param empty  what to say of a store with no schema yet (version 0).
 * @throws TidemarkError TIDEMARK_ERR_STORE_SCHEMA (newer, or older under read-only) or TIDEMARK_ERR_STORE_OPEN (empty, read-only).
 */
export function checkSchemaVersion(where: string, found: number, latest: number, readonly: boolean, empty: string): void {
  if (found > latest) {
    throw new TidemarkError(
      'TIDEMARK_ERR_STORE_SCHEMA',
      `${where}: its schema version is ${found}, newer than ${latest}, the newest this tidemark knows. It was left untouched; upgrade tidemark to read it.`,
    );
  }
  if (readonly && found < latest) {
    throw new TidemarkError(
      found === 0 ? 'TIDEMARK_ERR_STORE_OPEN' : 'TIDEMARK_ERR_STORE_SCHEMA',
      found === 0
        ? `${where}: ${empty} Write a run to it first.`
        : `${where}: its schema version ${found} needs an upgrade to ${latest}, which a read-only open cannot do. Open it once writable.`,
    );
  }
}
