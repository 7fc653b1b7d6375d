/**
 * What the examples' command lines share: integer arguments, serving the store with a fallback port, and
 * telling one Ctrl-C from its relayed copies.
 */
import { TidemarkError, startServer, type RunningServer } from '../src/index.js';

/** A parser of integer arguments that reports a bad one through `fail` (which prints usage and exits). */
export function integerArgs(fail: (message: string) => never) {
  return (name: string, raw: string | undefined, fallback: number, min: number, max = Number.MAX_SAFE_INTEGER): number => {
    if (raw === undefined) return fallback;
    const n = Number(raw);
    if (!Number.isInteger(n) || n < min || n > max) fail(`--${name} must be an integer from ${min} to ${max}; received '${raw}'`);
    return n;
  };
}

/**
 * Serves the SQLite store `db` on `port`; a port in use (or closed to this user) falls back to a free one,
 * said on the console. Any other failure goes to `fail`.
 */
export async function serveWithFallback(
  db: string,
  port: number,
  portGiven: boolean,
  fail: (message: string) => never,
  onError: (e: unknown) => void,
): Promise<RunningServer> {
  try {
    return await startServer({ db, port, onError });
  } catch (e) {
    const cause = e instanceof TidemarkError ? (e.cause as { code?: string } | undefined)?.code : undefined;
    if (cause !== 'EADDRINUSE' && cause !== 'EACCES') fail(e instanceof Error ? e.message : String(e));
    const server = await startServer({ db, port: 0, onError }).catch((e2: unknown) => fail(e2 instanceof Error ? e2.message : String(e2)));
    const why = cause === 'EADDRINUSE' ? 'is already in use' : 'is not open to this user';
    console.log(`Port ${port} ${why}; serving on free port ${server.port} instead${portGiven ? '' : ' (--port N picks one)'}.\n`);
    return server;
  }
}

/**
 * A signal handler calling `press()` once per Ctrl-C: in a terminal one press reaches the process more than
 * once (from the terminal, and relayed by npm and tsx), so copies within a second count as one.
 */
export function oncePerPress(press: () => void): () => void {
  let last = 0;
  return () => {
    const now = Date.now();
    if (now - last < 1000) return;
    last = now;
    press();
  };
}
