/**
 * The error catalogue. Every error tidemark throws or reports carries a stable `code` from this
 * table; docs/errors.md documents each one (a test keeps the two in step).
 */

export const ERROR_CODES = {
  TIDEMARK_ERR_OPTION_UNKNOWN: 'An option name is not recognised.',
  TIDEMARK_ERR_OPTION_INVALID: 'An option has a value of the wrong type or out of range.',
  TIDEMARK_ERR_MODEL_INVALID: 'The first argument of monitor() is not a tf.LayersModel.',
  TIDEMARK_ERR_MODEL_NOT_COMPILED: 'The model has no optimizer because it was not compiled.',
  TIDEMARK_ERR_MODEL_NO_TRAINABLE: 'The model has no trainable weights to measure.',
  TIDEMARK_ERR_MONITOR_CLOSED: 'The monitor was used after close().',
  TIDEMARK_ERR_SINK_OPEN: 'The record sink could not be opened.',
  TIDEMARK_ERR_SINK_WRITE: 'Records could not be written to the sink; monitoring continues in memory.',
  TIDEMARK_ERR_STATISTIC: 'Computing a statistic failed during training; the monitor skipped it.',
  TIDEMARK_ERR_LISTENER: 'An onWindow listener threw; the error was caught.',
  TIDEMARK_ERR_NONFINITE: 'NaN or infinite gradient values were seen and kept out of the statistics.',
  TIDEMARK_ERR_PROBE_INVALID: 'The probe set does not fit the model, its targets do not fit the probe set, or it would exceed its memory budget.',
  TIDEMARK_ERR_NOISE: 'A noise measurement could not run (no training rows, or the model failed on them); the window is kept without a noise scale.',
  TIDEMARK_ERR_GRADIENTS_ZERO: 'Every gradient of a layer, or of the whole network, was exactly zero in a window: it no longer learns.',
  TIDEMARK_ERR_ADVICE_WATCH: 'The quantity advice.watch names is not in the training logs, so the stop advice cannot judge it.',
  TIDEMARK_ERR_PROBE: 'The activation probe failed or met non-finite activations during training; the window is kept without (some) probe values.',
  TIDEMARK_ERR_STORE_OPEN: 'The store file could not be opened: missing, not a SQLite file, or not a tidemark store.',
  TIDEMARK_ERR_STORE_SCHEMA: 'The store was written by a newer tidemark (its schema version is higher than this code knows).',
  TIDEMARK_ERR_STORE_WRITE: 'Writing to the store failed (disk full, locked too long, read-only file); nothing of that batch was kept.',
  TIDEMARK_ERR_STORE_READ: 'Reading from the store failed (damaged file, I/O error, locked too long).',
  TIDEMARK_ERR_STORE_READONLY: 'A write was asked of a store opened read-only.',
  TIDEMARK_ERR_STORE_CLOSED: 'The store was used after close().',
  TIDEMARK_ERR_RUN_NOT_FOUND: 'No run matches the given id, id prefix or name.',
  TIDEMARK_ERR_RUN_LIVE: 'The run is still training; it was not deleted.',
  TIDEMARK_ERR_RUN_AMBIGUOUS: 'More than one run matches the given id prefix or name.',
  TIDEMARK_ERR_RECORD_INVALID: 'A record given to the store, or a line of an import file, is malformed.',
  TIDEMARK_ERR_IMPORT_INCOMPLETE: 'A file to import is incomplete (a run without an end record, or a cut last line); nothing was imported.',
  TIDEMARK_ERR_FILE_WRITE: 'An output file could not be written (a directory, a missing directory, no permission).',
  TIDEMARK_ERR_FILE_READ: 'A file to import could not be read.',
  TIDEMARK_ERR_UNAUTHORIZED: 'A request or connection to the server lacked the right token, or came from a page of another origin.',
  TIDEMARK_ERR_REQUEST_INVALID: 'An HTTP request to the server had a bad parameter or body.',
  TIDEMARK_ERR_MESSAGE_INVALID: 'A WebSocket message was not valid JSON, not a known message type, or broke the protocol schema.',
  TIDEMARK_ERR_PAYLOAD_TOO_LARGE: 'A request body or WebSocket message was over the size limit.',
  TIDEMARK_ERR_RATE_LIMITED: 'A connection sent messages faster than its limit; the message was not processed.',
  TIDEMARK_ERR_NOT_FOUND: 'No such route on the server.',
  TIDEMARK_ERR_INTERNAL: 'The server failed while answering; details are in its own log, not in the reply.',
  TIDEMARK_ERR_SERVE_UNSAFE: 'The server was asked to listen beyond loopback without a token.',
  TIDEMARK_ERR_SERVE_LISTEN: 'The server could not listen on the address (port in use, no permission).',
  TIDEMARK_ERR_REMOTE_URL: 'The URL of a remote writer is not a ws:// or wss:// URL with a host.',
  TIDEMARK_ERR_REMOTE_CONNECT: 'A remote writer lost, or could not open, its connection to the server; it keeps its records and reconnects.',
  TIDEMARK_ERR_REMOTE_REFUSED: 'The server refused a batch of a remote writer for good; its records were dropped.',
  TIDEMARK_ERR_REMOTE_SPILL: 'A remote writer could not write or read its spill file.',
  TIDEMARK_ERR_REMOTE_UNSENT: 'A remote writer closed with records the server had not acknowledged; they were kept in its spill file.',
} as const;

export type ErrorCode = keyof typeof ERROR_CODES;

/** An error with a stable code. `message` names what was received and what to do. */
export class TidemarkError extends Error {
  readonly code: ErrorCode;
  override readonly cause?: unknown;

  constructor(code: ErrorCode, message: string, options: { cause?: unknown } = {}) {
    super(message);
    this.name = 'TidemarkError';
    this.code = code;
    if (options.cause !== undefined) this.cause = options.cause;
  }
}

/** A TypeError with a code, for arguments of the wrong kind. */
export class TidemarkTypeError extends TypeError {
  readonly code: ErrorCode;
  constructor(code: ErrorCode, message: string) {
    super(message);
    this.name = 'TidemarkTypeError';
    this.code = code;
  }
}

/** A RangeError with a code, for values outside their limits. */
export class TidemarkRangeError extends RangeError {
  readonly code: ErrorCode;
  constructor(code: ErrorCode, message: string) {
    super(message);
    this.name = 'TidemarkRangeError';
    this.code = code;
  }
}

/** Something went wrong during training that the monitor absorbed instead of throwing into fit. */
export interface MonitorWarning {
  code: ErrorCode;
  message: string;
  /** Step at which it happened, when known. */
  step: number | null;
  cause?: unknown;
}

/** The stable code an error carries, if it is one of ours (a TidemarkError, or anything with such a `code`). */
export function codeOf(e: unknown): ErrorCode | null {
  const code = (e as { code?: unknown } | null)?.code;
  return typeof code === 'string' && code in ERROR_CODES ? (code as ErrorCode) : null;
}

export function describeCause(cause: unknown): string {
  if (cause instanceof Error) return cause.message;
  return String(cause);
}
