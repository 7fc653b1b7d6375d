#!/usr/bin/env node
/**
 * The `tidemark` command. Exit codes: 0 success, 1 a failure while working, 2 a usage error.
 */
import { readFileSync } from 'node:fs';
import { parseArgs } from 'node:util';
import { summarizeJsonl, type RunSummary } from '../storage/jsonl-reader.js';

const HELP = `tidemark: per-layer gradient signal-to-noise, noise scale and weight travel of TensorFlow.js runs

Usage:
  tidemark summary FILE.jsonl    runs in a JSON Lines store, with each layer's latest numbers
  tidemark --version
  tidemark --help

Exit codes: 0 ok, 1 failed (e.g. unreadable file), 2 usage error.
The numbers are statistical estimates; confirm any decision to stop training on held-out data.
`;

function version(): string {
  const pkg = JSON.parse(readFileSync(new URL('../../package.json', import.meta.url), 'utf8')) as { version: string };
  return pkg.version;
}

function fmt(x: number | null | undefined, digits = 3): string {
  if (x === null || x === undefined) return '—';
  if (Number.isNaN(x)) return 'NaN';
  if (!Number.isFinite(x)) return x > 0 ? '+Inf' : '-Inf';
  const a = Math.abs(x);
  return a !== 0 && (a >= 1e5 || a < 1e-3) ? x.toExponential(2) : x.toFixed(digits);
}

function table(rows: string[][]): string {
  const widths = rows[0]!.map((_, c) => Math.max(...rows.map((r) => r[c]!.length)));
  return rows.map((r) => r.map((cell, c) => (c === 0 ? cell.padEnd(widths[c]!) : cell.padStart(widths[c]!))).join('  ')).join('\n');
}

function render(s: RunSummary): string {
  const head = `${s.run.name}  (${s.run.id}, ${s.status}, ${s.windows} windows)`;
  const w = s.last;
  if (w === null) return `${head}\n  no windows yet`;
  const rows = [['layer', 'SNR dB', 'noise scale', 'travel', 'exponent', 'K']];
  for (const [name, l] of [...Object.entries(w.layers), ['(network)', w.network] as const]) {
    rows.push([name, fmt(l.grad_snr_db, 1), fmt(l.noise_scale, 1), fmt(l.weight_travel), fmt(l.travel_exponent, 2), String(l.batches)]);
  }
  const floor = w.snr_floor > 0 ? `${fmt(20 * Math.log10(w.snr_floor), 1)} dB` : '0 (whole epoch)';
  return `${head}\n  step ${w.step}, epoch ${w.epoch ?? '—'}, SNR floor ${floor}\n${table(rows)
    .split('\n')
    .map((l) => `  ${l}`)
    .join('\n')}`;
}

export async function main(argv: string[]): Promise<number> {
  let parsed;
  try {
    parsed = parseArgs({
      args: argv,
      allowPositionals: true,
      options: { help: { type: 'boolean', short: 'h' }, version: { type: 'boolean', short: 'v' } },
    });
  } catch (e) {
    process.stderr.write(`${(e as Error).message}\n\n${HELP}`);
    return 2;
  }
  const { values, positionals } = parsed;
  if (values.version) {
    process.stdout.write(`${version()}\n`);
    return 0;
  }
  const [command, ...rest] = positionals;
  if (values.help || command === undefined) {
    process.stdout.write(HELP);
    return values.help ? 0 : 2;
  }
  if (command === 'summary') {
    if (rest.length !== 1) {
      process.stderr.write(`tidemark summary takes one JSON Lines file; got ${rest.length} arguments.\n`);
      return 2;
    }
    try {
      const runs = await summarizeJsonl(rest[0]!);
      if (runs.length === 0) process.stdout.write('No runs in this file.\n');
      for (const s of runs) process.stdout.write(`${render(s)}\n\n`);
      return 0;
    } catch (e) {
      process.stderr.write(`tidemark: cannot read ${rest[0]}: ${(e as Error).message}\n`);
      return 1;
    }
  }
  process.stderr.write(`Unknown command '${command}'.\n\n${HELP}`);
  return 2;
}

process.exitCode = await main(process.argv.slice(2));
