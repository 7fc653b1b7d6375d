/** Plain-text tables and numbers for the terminal. */

export function fmt(x: number | null | undefined, digits = 3): string {
  if (x === null || x === undefined) return '—';
  if (Number.isNaN(x)) return 'NaN';
  if (!Number.isFinite(x)) return x > 0 ? '+Inf' : '-Inf';
  const a = Math.abs(x);
  return a !== 0 && (a >= 1e5 || a < 1e-3) ? x.toExponential(2) : x.toFixed(digits);
}

export function fmtDb(x: number | null | undefined): string {
  if (x === null || x === undefined || Number.isNaN(x)) return '—';
  if (!Number.isFinite(x)) return x > 0 ? '+Inf' : '-Inf';
  return `${x >= 0 ? '+' : ''}${x.toFixed(1)}`;
}

export function fmtTime(ms: number | null): string {
  if (ms === null) return '—';
  // Stored times are UTC; say so, since a reader's clock may not be.
  return `${new Date(ms).toISOString().replace('T', ' ').slice(0, 19)} UTC`;
}

/** Left-aligns the first column, right-aligns the rest. */
export function table(rows: string[][], indent = ''): string {
  if (rows.length === 0) return '';
  const widths = rows[0]!.map((_, c) => Math.max(...rows.map((r) => (r[c] ?? '').length)));
  return rows
    .map((r) => indent + r.map((cell, c) => (c === 0 ? cell.padEnd(widths[c]!) : cell.padStart(widths[c]!))).join('  ').trimEnd())
    .join('\n');
}

/** Control characters in user-supplied names would garble a terminal; show them escaped. */
export function printable(s: string, max = 80): string {
  // eslint-disable-next-line no-control-regex
  const clean = s.replace(/[\u0000-\u001f\u007f]/g, (c) => (c === '\n' ? '\\n' : c === '\t' ? '\\t' : `\\x${c.charCodeAt(0).toString(16).padStart(2, '0')}`));
  return clean.length > max ? `${clean.slice(0, max - 1)}…` : clean;
}
