/**
 * Access checks: the bearer token, compared in constant time, and the Origin of browser WebSocket
 * upgrades (a page on another site must not open a live stream with the user's network position).
 */
import { createHash, timingSafeEqual } from 'node:crypto';
import type { IncomingMessage } from 'node:http';

/** Hashing first makes the comparison constant-time whatever the lengths. */
function digest(s: string): Buffer {
  return createHash('sha256').update(s, 'utf8').digest();
}

export function tokenMatches(expected: string, given: string | null | undefined): boolean {
  if (typeof given !== 'string') return false;
  return timingSafeEqual(digest(expected), digest(given));
}

/** The token a request carries: `Authorization: Bearer T`, else the `token` query parameter. */
export function tokenOf(req: IncomingMessage | { headers: IncomingMessage['headers']; url?: string }): string | null {
  const header = req.headers.authorization;
  if (typeof header === 'string') {
    const m = /^Bearer\s+(.+)$/i.exec(header.trim());
    if (m !== null) return m[1]!;
  }
  const url = req.url ?? '';
  const q = url.indexOf('?');
  if (q < 0) return null;
  return new URLSearchParams(url.slice(q + 1)).get('token');
}

/**
 * A browser sends Origin on every WebSocket upgrade. Allowed: no Origin (not a browser), the server's
 * own origin (the page it serves), or the one origin configured with `cors`.
 */
export function originAllowed(req: IncomingMessage, cors: string | null): boolean {
  const origin = req.headers.origin;
  if (origin === undefined) return true;
  if (cors !== null && (cors === '*' || origin === cors)) return true;
  const host = req.headers.host;
  return host !== undefined && (origin === `http://${host}` || origin === `https://${host}`);
}

/** True for addresses that only this machine can reach. */
export function isLoopback(host: string): boolean {
  const h = host.replace(/^\[|\]$/g, '').toLowerCase();
  return h === 'localhost' || h === '::1' || /^127\.\d{1,3}\.\d{1,3}\.\d{1,3}$/.test(h) || h === '::ffff:127.0.0.1';
}
