/**
 * CSV records per RFC 4180 (Y. Shafranovich 2005, "Common Format and MIME Type for Comma-Separated
 * Values (CSV) Files"): comma-separated fields, CRLF after each record, a field quoted when it holds
 * a comma, double quote, CR or LF, and quotes inside a quoted field doubled.
 */

import { TidemarkTypeError } from '../errors.js';

/** A value one CSV field can hold. `null` is a missing value. */
export type CsvValue = string | number | null;

// Characters that force quoting: the RFC 4180 set (comma, quote, CR, LF), plus a leading or
// trailing space, which the RFC keeps as data but many readers trim unless the field is quoted.
const NEEDS_QUOTES = /[",\r\n]|^ | $/;

/**
 * One field, without the record separator.
 *
 * - `null` → an empty field; the empty string → `""`, so a reader that reports quoting can tell
 *   the two apart (both read back as `''` from a plain parser).
 * - Finite numbers → `String(x)`, the shortest decimal that reads back to the same double
 *   (ECMA-262 Number::toString); `-0` → `-0`, so `Number()` returns `-0` rather than `0`.
 * - `NaN`, `Infinity`, `-Infinity` → those words, which `Number()` also reads back.
 * - Strings → unchanged, or wrapped in double quotes with inner quotes doubled when needed.
 *
 * @throws TidemarkTypeError (`TIDEMARK_ERR_OPTION_INVALID`) for any other kind of value.
 */
export function csvField(value: CsvValue): string {
  if (value === null) return '';
  if (typeof value === 'number') {
    // String(-0) is "0", which would lose the sign.
    return Object.is(value, -0) ? '-0' : String(value);
  }
  if (typeof value === 'string') {
    if (value === '') return '""';
    return NEEDS_QUOTES.test(value) ? `"${value.replaceAll('"', '""')}"` : value;
  }
  throw new TidemarkTypeError(
    'TIDEMARK_ERR_OPTION_INVALID',
    `csvField: expected a string, number or null, received ${describe(value)}; convert it first.`,
  );
}

/**
 * One CSV record: the fields of `fields` formatted by {@link csvField}, joined by commas and
 * terminated by CRLF.
 *
 * @throws TidemarkTypeError (`TIDEMARK_ERR_OPTION_INVALID`) when `fields` is empty (an RFC 4180
 *   record has at least one field) or holds a value that is not a string, number or null.
 */
export function csvLine(fields: readonly CsvValue[]): string {
  if (fields.length === 0) {
    throw new TidemarkTypeError(
      'TIDEMARK_ERR_OPTION_INVALID',
      'csvLine: received an empty array; a CSV record needs at least one field.',
    );
  }
  let line = csvField(fields[0]!);
  for (let i = 1; i < fields.length; i++) line += ',' + csvField(fields[i]!);
  return line + '\r\n';
}

function describe(value: unknown): string {
  if (value === undefined) return 'undefined';
  if (typeof value === 'bigint') return `the bigint ${value}n`;
  return typeof value === 'object' ? 'an object' : `a ${typeof value}`;
}
