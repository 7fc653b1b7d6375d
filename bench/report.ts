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
