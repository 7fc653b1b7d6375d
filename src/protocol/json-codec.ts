/**
 * The protocol's JSON: plain JSON, except that NaN, Infinity and -Infinity (which JSON cannot hold) are
 * written as the strings "NaN", "Infinity" and "-Infinity" and read back as numbers. Every writer and
 * reader of records (sinks, stores, the server, the page) uses this one codec.
 */

const NON_FINITE: Record<string, number> = { NaN: Number.NaN, Infinity: Infinity, '-Infinity': -Infinity };

/** JSON.stringify, with NaN and ±Infinity as strings. */
export function encodeJson(value: unknown): string {
  return JSON.stringify(value, (_key, v: unknown) => (typeof v === 'number' && !Number.isFinite(v) ? String(v) : v));
}

/** Inverse of {@link encodeJson}. */
export function decodeJson(text: string): unknown {
  return JSON.parse(text, (_key, value: unknown) => (typeof value === 'string' && value in NON_FINITE ? NON_FINITE[value] : value));
}
