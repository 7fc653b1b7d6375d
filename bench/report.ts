/** Printing for the benches: aligned tables with notes, and progress lines on stderr. */

export function printTable(title: string, head: string[], rows: string[][], notes: string[] = []): void {
  const widths = head.map((h, i) => Math.max(h.length, ...rows.map((r) => (r[i] ?? '').length)));
  const line = (cells: string[]): string =>
    cells.map((c, i) => (i === 0 ? c.padEnd(widths[i]!) : c.padStart(widths[i]!))).join('  ');
  console.log(`\n${title}`);
  console.log(line(head));
  console.log(widths.map((w) => '-'.repeat(w)).join('  '));
  for (const r of rows) console.log(line(r));
  for (const n of notes) console.log(`  ${n}`);
}

export function progress(message: string): void {
  process.stderr.write(`  … ${message}\n`);
}

/** The median of the values (NaN for none). */
export function median(xs: readonly number[]): number {
  if (xs.length === 0) return Number.NaN;
  const s = [...xs].sort((a, b) => a - b);
  const h = s.length >> 1;
  return s.length % 2 === 1 ? s[h]! : (s[h - 1]! + s[h]!) / 2;
}

/** The value at rank ⌊q·n⌋ of values sorted ascending (NaN for none): the latency benches' p50 and p99. */
export function quantile(sorted: readonly number[], q: number): number {
  if (sorted.length === 0) return Number.NaN;
  return sorted[Math.min(sorted.length - 1, Math.floor(q * sorted.length))]!;
}

export const fmtInt = (x: number): string => Math.round(x).toLocaleString('en-US');
export const fmtMs = (x: number): string => (Number.isNaN(x) ? '–' : x < 10 ? x.toFixed(2) : x.toFixed(1));
export const fmtRatio = (x: number): string => x.toFixed(2);
