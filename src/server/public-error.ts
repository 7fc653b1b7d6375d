/**
 * What a client of the server (HTTP or WebSocket) is told about an error: a stable code, an HTTP status and
 * a message that leaks nothing of the store.
 */
import { codeOf, ERROR_CODES, TidemarkError, type ErrorCode } from '../errors.js';

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

/** A request the client got wrong (400), its message shown as it is. */
export const badRequest = (message: string): TidemarkError => new TidemarkError('TIDEMARK_ERR_REQUEST_INVALID', message);
