/**
 * The `tidemark` command. Exit codes: 0 success; 1 a failure while working (unreadable store, write
 * error); 2 a usage error; 3 the named run does not exist or is ambiguous.
 */
import { readFileSync, statSync, writeFileSync } from 'node:fs';
import { join } from 'node:path';
import { Command, CommanderError, Option } from 'commander';
import { TidemarkError, TidemarkRangeError, TidemarkTypeError } from '../errors.js';
import type { RunStatus } from '../protocol/records.js';
import { summarizeJsonl, type RunSummary } from '../storage/jsonl-reader.js';
import { exportRun, importJsonl } from '../storage/export.js';
import { resendSpill } from '../storage/resend.js';
import type { AsyncStore } from '../storage/async-store.js';
import { connectStore, isPostgresUrl } from '../storage/connect-store.js';
import { GROUP_ALIGNS, groupReport, sweepOf, SWEEP_OUTCOMES, type GroupAlign, type SweepOutcome } from '../storage/group-report.js';
import { renderGroup, renderSweep } from './group.js';
import type { RunDetail, RunRow } from '../storage/store.js';
import { displacementLevelDb, PHASE_DEFAULTS, PHASE_RULES } from '../analysis/phase-detector.js';
import { ADVICE_DEFAULTS, ADVICE_RULES, zeroGradients } from '../analysis/stop-advice.js';
import { describeRule, satisfies, type OptionRule } from '../option-check.js';
import { SERVER_RULES } from '../server/app.js';
import { analyzeRun, offlineMarkers, type AnalyzeResult } from './analyze.js';
import { fmt, fmtDb, fmtTime, printable, table } from './format.js';
import { latestProbe, renderProbe } from './probe.js';
import { startServer } from '../server/serve.js';

export const EXIT = { ok: 0, failed: 1, usage: 2, notFound: 3 } as const;

const CAUTION =
  'These numbers are statistical estimates from minibatches, not guarantees about the model; confirm any decision to stop training on held-out data.';

interface Io {
  out: (s: string) => void;
  err: (s: string) => void;
}

function defaultDb(): string {
  return process.env.TIDEMARK_DB ?? 'tidemark.db';
}

function version(): string {
  const pkg = JSON.parse(readFileSync(new URL('../../package.json', import.meta.url), 'utf8')) as { version: string };
  return pkg.version;
}

/** A count, with thousands separators. */
const count = (n: number): string => n.toLocaleString('en-US');

const AGE_UNITS: Record<string, number> = { min: 60_000, h: 3_600_000, d: 86_400_000, w: 7 * 86_400_000 };

/** Accepts an ISO date/time or an age such as 90min, 12h, 30d, 2w (`m` alone is refused: minutes or months?). */
export function parseBefore(text: string, now = Date.now()): number {
  const age = /^(\d+(?:\.\d+)?)\s*([a-z]+)$/i.exec(text.trim());
  if (age) {
    const unit = AGE_UNITS[age[2]!.toLowerCase()];
    if (unit === undefined) {
      throw new TidemarkTypeError(
        'TIDEMARK_ERR_OPTION_INVALID',
        `--before: '${age[2]}' is not a unit of age${age[2]!.toLowerCase() === 'm' ? ' (minutes or months?)' : ''}; use min, h, d or w (90min, 12h, 30d, 2w), or a date such as 2026-11-30.`,
      );
    }
    return now - Number(age[1]) * unit;
  }
  const t = Date.parse(text);
  if (Number.isNaN(t)) {
    throw new TidemarkTypeError(
      'TIDEMARK_ERR_OPTION_INVALID',
      `--before takes a date (2026-11-30, 2026-11-30T12:00Z) or an age (90min, 12h, 30d, 2w); received '${text}'.`,
    );
  }
  return t;
}

function statusMark(s: RunStatus): string {
  return s;
}

function runsTable(rows: RunRow[]): string {
  const lines = [['name', 'id', 'status', 'group', 'steps', 'windows', 'started']];
  for (const r of rows) {
    lines.push([
      printable(r.name, 40),
      r.id.slice(0, 8),
      statusMark(r.status),
      r.group === null ? '—' : printable(r.group, 24),
      r.last_step === null ? '—' : String(r.last_step),
      String(r.windows),
      fmtTime(r.created_at),
    ]);
  }
  return table(lines);
}

const SHOW_METRICS = ['grad_snr_db', 'weight_travel', 'travel_exponent', 'update_ratio', 'nonfinite'] as const;

interface LatestRow {
  layer: string;
  values: Partial<Record<(typeof SHOW_METRICS)[number], number | null>>;
  /** The phase detector's level in the last window, dB (null for windows stored without grad_diff_norm). */
  level: number | null;
  /** The latest measured noise scale and its step (measured now and then, not in every window). */
  noise: { value: number; step: number } | null;
}

async function latest(store: AsyncStore, run: RunDetail): Promise<{ step: number | null; rows: LatestRow[]; logs: Record<string, number>; zero: { network: boolean; layers: string[] } }> {
  const step = run.last_step;
  if (step === null) return { step, rows: [], logs: {}, zero: { network: false, layers: [] } };
  const at = async (metric: string, layer: string | null): Promise<number | null> => {
    const pts = await store.series(run.id, metric, { layer, from: step, to: step });
    return pts.length > 0 ? pts[pts.length - 1]!.value : null;
  };
  const layers = [...run.layers.map((l) => l.name), null];
  const last = (await store.windows(run.id, { after: step - 1 })).at(-1);
  const rows: LatestRow[] = [];
  for (const layer of layers) {
    const values: LatestRow['values'] = {};
    for (const m of SHOW_METRICS) values[m] = await at(m, layer);
    const stats = last === undefined ? undefined : layer === null ? last.network : last.layers[layer];
    const db = last === undefined || stats === undefined ? Number.NaN : displacementLevelDb(last, stats);
    const level = Number.isFinite(db) ? db : null;
    const n = (await store.series(run.id, 'noise_scale', { layer, last: 1 }))[0];
    rows.push({ layer: layer ?? '(network)', values, level, noise: n === undefined ? null : { value: n.value, step: n.step } });
  }
  const logs: Record<string, number> = {};
  const layerNames = new Set(run.layers.map((l) => l.name));
  for (const key of await store.seriesKeys(run.id)) {
    if (key.layer !== null || layerNames.has(key.metric)) continue;
    if (['loss', 'val_loss', 'acc', 'val_acc', 'accuracy', 'val_accuracy'].includes(key.metric)) {
      const v = await at(key.metric, null);
      if (v !== null) logs[key.metric] = v;
    }
  }
  return { step, rows, logs, zero: last === undefined ? { network: false, layers: [] } : zeroGradients(last) };
}

async function renderShow(store: AsyncStore, run: RunDetail): Promise<string> {
  const out: string[] = [];
  out.push(`${printable(run.name, 200)}`);
  out.push(`  id       ${run.id}`);
  out.push(`  status   ${run.status}${run.ended_at !== null ? ` at ${fmtTime(run.ended_at)}` : ''}`);
  out.push(`  started  ${fmtTime(run.created_at)}`);
  if (run.group !== null) out.push(`  group    ${printable(run.group)}`);
  const tags = Object.entries(run.tags);
  if (tags.length > 0) out.push(`  tags     ${tags.map(([k, v]) => `${printable(k)}=${printable(v)}`).join(', ')}`);
  const l = await latest(store, run);
  out.push(`  windows  ${run.windows}${l.step !== null ? `, last at step ${l.step}` : ''}`);
  const logs = Object.entries(l.logs);
  if (logs.length > 0) out.push(`  logs     ${logs.map(([k, v]) => `${k} ${fmt(v, 4)}`).join(', ')}`);
  if (l.rows.length > 0) {
    out.push('');
    const rows = [['layer', 'SNR dB', 'level dB', 'noise scale (at step)', 'travel', 'exponent', 'update', 'non-finite']];
    for (const r of l.rows) {
      rows.push([
        printable(r.layer, 40),
        fmtDb(r.values.grad_snr_db),
        fmtDb(r.level),
        r.noise === null ? '—' : `${fmt(r.noise.value, 1)} (${r.noise.step})`,
        fmt(r.values.weight_travel),
        fmt(r.values.travel_exponent, 2),
        fmt(r.values.update_ratio),
        r.values.nonfinite == null ? '—' : String(r.values.nonfinite),
      ]);
    }
    out.push(table(rows, '  '));
    if (l.zero.network) out.push('  Every gradient of the last window was exactly zero: the network no longer learns (dead units, or a learning rate that broke it).');
    else if (l.zero.layers.length > 0) out.push(`  Every gradient of ${l.zero.layers.join(', ')} was exactly zero in the last window: dead units, no longer learning.`);
    out.push(
      '  SNR dB: the last window\'s gradient SNR (mean over spread of its minibatches). level dB: what the phases follow,',
      '  the weights\' movement along the mean gradient against the noise\'s (above 0 drift). The noise scale is measured',
      '  now and then at fixed weights; "—" where none was resolved.',
    );
  }
  const probe = await latestProbe(store, run);
  if (probe !== null) out.push('', ...renderProbe(probe));
  const markers = await store.markers(run.id);
  out.push('');
  if (markers.length === 0) out.push('  no markers');
  else {
    // Online markers came from the run as it trained; offline ones from 'tidemark analyze --write' with other settings.
    const rows = [['marker', 'layer', 'step', 'known at', 'confidence', 'source', 'detail']];
    for (const m of markers) {
      const stage = typeof m.details.stage === 'string' ? ` (${m.details.stage})` : '';
      const verdict = m.kind === 'advice' && typeof m.details.verdict === 'string' ? `${m.details.verdict}${stage}` : '';
      rows.push([
        m.kind,
        m.layer === null ? '(network)' : printable(m.layer, 40),
        String(m.step),
        String(m.detected_step),
        fmt(m.confidence, 2),
        m.details.source === 'offline' ? 'offline' : 'online',
        verdict,
      ]);
    }
    out.push(table(rows, '  '));
  }
  out.push('');
  out.push(CAUTION);
  return out.join('\n');
}

function renderSummary(s: RunSummary): string {
  const head = `${printable(s.run.name)}  (${s.run.id}, ${s.status}, ${s.windows} windows)`;
  const w = s.last;
  if (w === null) return `${head}\n  no windows yet`;
  const rows = [['layer', 'SNR dB', 'noise scale', 'travel', 'exponent', 'K']];
  for (const [name, l] of [...Object.entries(w.layers), ['(network)', w.network] as const]) {
    rows.push([printable(name, 40), fmtDb(l.grad_snr_db), fmt(l.noise_scale, 1), fmt(l.weight_travel), fmt(l.travel_exponent, 2), String(l.batches)]);
  }
  const floor = w.snr_floor > 0 ? `${fmt(20 * Math.log10(w.snr_floor), 1)} dB` : '0 (whole epoch)';
  // Epochs are counted from 1 wherever a person reads them (the stored field, as fit counts, starts at 0).
  return `${head}\n  step ${w.step}, epoch ${w.epoch === null ? '—' : w.epoch + 1}, SNR floor ${floor}\n${table(rows, '  ')}`;
}

function renderAnalysis(run: RunDetail, r: AnalyzeResult, written: boolean): string {
  const out = [`${printable(run.name, 200)} (${run.id}): ${r.windows} windows re-analysed`];
  const rows = [['change', 'layer', 'step', 'known at', 'confidence', 'online']];
  for (const c of r.changes) {
    const m = r.matched.find((x) => x.offline === c);
    const online =
      m === undefined
        ? 'new'
        : m.stepShift === 0 && m.online.detected_step === c.detected_step
          ? 'same'
          : `step ${m.online.step}, known at ${m.online.detected_step}`;
    rows.push([c.kind, c.layer === null ? '(network)' : printable(c.layer, 40), String(c.step), String(c.detected_step), fmt(c.confidence, 2), online]);
  }
  out.push('', r.changes.length === 0 ? '  no phase changes found' : table(rows, '  '));
  if (r.missing.length > 0) {
    out.push('', '  online markers not found with these settings:');
    for (const m of r.missing) out.push(`    ${m.kind} ${m.layer === null ? '(network)' : printable(m.layer, 40)} at step ${m.step}`);
  }
  if (r.added.length === 0 && r.missing.length === 0 && r.matched.every((m) => m.stepShift === 0)) {
    out.push('', '  Same phase changes as recorded online.');
  }
  if (r.advice !== null) out.push('', `  advice at the last window: ${r.advice.verdict}. ${r.advice.reason}`);
  out.push('', written ? '  Offline markers written (marked source: offline; the online ones stay).' : '  Nothing written (use --write to store these markers).');
  out.push('', CAUTION);
  return out.join('\n');
}

function parseLossTarget(value: string): number {
  const x = Number(value);
  if (value.trim() === '' || !Number.isFinite(x) || x <= 0) throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `--loss-target takes a positive training loss, e.g. 0.3; received '${value}'.`);
  return x;
}

function parseTag(value: string, previous: Record<string, string> = {}): Record<string, string> {
  const i = value.indexOf('=');
  if (i <= 0) throw new TidemarkTypeError('TIDEMARK_ERR_OPTION_INVALID', `--tag takes key=value; received '${value}'.`);
  return { ...previous, [value.slice(0, i)]: value.slice(i + 1) };
}

/**
 * Says what is wrong with a store path before SQLite does (it would answer SQLITE_CANTOPEN or an I/O error):
 * a directory, or a file that does not exist where one is needed (`create` false). Returns whether it exists.
 */
function checkStorePath(db: string, create: boolean): boolean {
  // A database server's address is not a path: whether it answers is for the store to say when opened.
  if (isPostgresUrl(db)) return true;
  let isDir = false;
  let exists = false;
  try {
    const st = statSync(db);
    exists = true;
    isDir = st.isDirectory();
  } catch {
    exists = false;
  }
  if (isDir) {
    throw new TidemarkError(
      'TIDEMARK_ERR_STORE_OPEN',
      `${db} is a directory, not a store file. Point --db (or TIDEMARK_DB) at a file, such as ${join(db, 'tidemark.db')}.`,
    );
  }
  if (!exists && !create) {
    throw new TidemarkError(
      'TIDEMARK_ERR_STORE_OPEN',
      `There is no store at ${db}. A monitored training run creates one (monitor(model) writes tidemark.db in its working directory; 'npm run demo' makes one to look at), 'tidemark import FILE --db ${db}' creates one from a JSON Lines file, or point --db (or TIDEMARK_DB) at an existing store.`,
    );
  }
  return exists;
}

/** Writes an output file, with a coded error that says what is wrong with the path. */
function writeOut(path: string, text: string): void {
  try {
    writeFileSync(path, text);
  } catch (e) {
    const code = (e as { code?: string }).code ?? '';
    const why =
      code === 'EISDIR'
        ? 'it is a directory: give a file name, such as ' + join(path, 'run.csv')
        : code === 'ENOENT'
          ? 'its directory does not exist'
          : code === 'EACCES' || code === 'EPERM'
            ? 'permission denied'
            : code || (e as Error).message;
    throw new TidemarkError('TIDEMARK_ERR_FILE_WRITE', `Could not write ${path} (${why}).`, { cause: e });
  }
}

/** Opens the store at `db` (a SQLite file, or a postgres:// URL), runs `fn`, and closes it. */
async function withStore<T>(db: string, readonly: boolean, fn: (store: AsyncStore) => Promise<T>): Promise<T> {
  checkStorePath(db, false);
  const store = await connectStore(db, { readonly });
  try {
    return await fn(store);
  } finally {
    await store.close();
  }
}

export function buildProgram(io: Io): Command {
  const program = new Command();
  /** A numeric flag's parser: the same range as the option it sets, and the flag's name in the message. */
  const num =
    (flag: string, rule: OptionRule = { type: 'number' }) =>
    (v: string): number => {
      const n = v.trim() === '' ? Number.NaN : Number(v);
      if (!satisfies(rule, n)) {
        throw new TidemarkRangeError('TIDEMARK_ERR_OPTION_INVALID', `${flag} must be ${describeRule(rule)}; received '${v}'.`);
      }
      return n;
    };
  const P = PHASE_RULES;
  const A = ADVICE_RULES;
  program
    .name('tidemark')
    .description('Per-layer gradient signal-to-noise, noise scale and weight travel of TensorFlow.js runs, kept in a SQLite store.')
    .version(version(), '-v, --version')
    .addOption(new Option('--db <file|url>', 'the store: a SQLite file, or a postgres:// URL (default: $TIDEMARK_DB or tidemark.db)'))
    .configureOutput({ writeOut: io.out, writeErr: io.err })
    .showHelpAfterError()
    .exitOverride();
  const db = () => (program.opts<{ db?: string }>().db ?? defaultDb());

  program
    .command('runs')
    .description('list runs, newest first')
    .option('--name <text>', 'only runs whose name contains text')
    .option('--group <group>', 'only runs in this group')
    .option('--tag <key=value>', 'only runs with this tag (repeatable)', parseTag)
    .addOption(new Option('--status <status>', 'only runs with this status').choices(['running', 'finished', 'failed', 'interrupted']))
    .option('--limit <n>', 'at most n runs', num('--limit', { type: 'number', integer: true, min: 1, max: 1_000_000 }), 1000)
    .option('--json', 'machine-readable output')
    .action(async (o: { name?: string; group?: string; tag?: Record<string, string>; status?: RunStatus; limit: number; json?: boolean }) => {
      const rows = await withStore(db(), true, (s) =>
        s.runs({
          ...(o.name !== undefined && { name: o.name }),
          ...(o.group !== undefined && { group: o.group }),
          ...(o.tag !== undefined && { tags: o.tag }),
          ...(o.status !== undefined && { status: o.status }),
          limit: o.limit,
        }),
      );
      if (o.json) io.out(`${JSON.stringify(rows, null, 2)}\n`);
      else io.out(rows.length === 0 ? 'No runs.\n' : `${runsTable(rows)}\n`);
    });

  program
    .command('show')
    .description("a run's latest per-layer numbers, its latest probe values and its markers")
    .argument('<run>', 'run id, unique id prefix, or name')
    .option('--json', 'machine-readable output')
    .action(async (ref: string, o: { json?: boolean }) => {
      await withStore(db(), true, async (s) => {
        const run = await s.resolveRun(ref);
        if (o.json) {
          const l = await latest(s, run);
          // probe is null when the run has no probe values, so scripts can test for it without a key check.
          const probe = await latestProbe(s, run);
          io.out(`${JSON.stringify({ run, latest: l, probe, markers: await s.markers(run.id), caution: CAUTION }, null, 2)}\n`);
        } else io.out(`${await renderShow(s, run)}\n`);
      });
    });

  program
    .command('export')
    .description('write a run as CSV or JSON Lines')
    .argument('<run>', 'run id, unique id prefix, or name')
    .addOption(new Option('--format <format>', 'output format').choices(['csv', 'jsonl']).makeOptionMandatory())
    .option('--out <file>', 'write to a file instead of standard output')
    .action(async (ref: string, o: { format: 'csv' | 'jsonl'; out?: string }) => {
      const text = await withStore(db(), true, async (s) => exportRun(s, (await s.resolveRun(ref)).id, o.format));
      if (o.out !== undefined) writeOut(o.out, text);
      else io.out(text);
    });

  program
    .command('import')
    .description("add runs from a JSON Lines file: an export, a JSON Lines store, or a remote writer's spill file")
    .argument('<file>', 'JSON Lines file')
    .option('--partial', 'import a file that is incomplete (a run without an end record, a cut last line); such runs read as interrupted')
    .action(async (file: string, o: { partial?: boolean }) => {
      checkStorePath(db(), true);
      const store = await connectStore(db());
      try {
        const report = await importJsonl(store, file, { partial: o.partial === true });
        for (const id of report.runs) {
          const w = report.windows[id]!;
          const state =
            w.inFile > 0 && w.added === 0
              ? 'already in the store, nothing new'
              : `${count(w.added)} new window${w.added === 1 ? '' : 's'} of ${count(w.inFile)} in the file`;
          io.out(`Imported run ${id}: ${state}${report.unended.includes(id) ? ' (no end record: reads as interrupted)' : ''}.\n`);
        }
        if (report.runs.length === 0) io.out('The file holds no runs.\n');
        if (report.tornLastLine) io.out('The last line was cut off and was skipped.\n');
      } finally {
        await store.close();
      }
    });

  program
    .command('resend')
    .description("send a remote writer's spill file (its unsent batches) to a tidemark server")
    .argument('<file>', 'the spill file named in the writer\'s TIDEMARK_ERR_REMOTE_UNSENT message')
    .requiredOption('--to <address>', "the server: http://host:port as 'tidemark serve' prints it, or ws://host:port")
    .option('--token <token>', 'the server\'s token (default: $TIDEMARK_TOKEN, else none)')
    .action(async (file: string, o: { to: string; token?: string }) => {
      const token = o.token ?? process.env.TIDEMARK_TOKEN;
      const r = await resendSpill(file, o.to, token !== undefined && token !== '' ? { token } : {});
      io.out(
        `Sent ${count(r.batches)} batch${r.batches === 1 ? '' : 'es'} (${count(r.records)} records) of run ${r.runs.join(', ') || '—'}` +
          `${r.duplicates > 0 ? `; the server already had ${count(r.duplicates)} of them` : ''}. The file can be deleted.\n`,
      );
    });

  program
    .command('delete')
    .description('delete a run and everything stored for it')
    .argument('<run>', 'run id, unique id prefix, or name')
    .option('--force', 'delete it even while it is still training')
    .action(async (ref: string, o: { force?: boolean }) => {
      await withStore(db(), false, async (s) => {
        const run = await s.resolveRun(ref);
        if (run.status === 'running' && o.force !== true) {
          const ago = Math.max(0, Math.round((Date.now() - run.heartbeat_at) / 1000));
          throw new TidemarkError(
            'TIDEMARK_ERR_RUN_LIVE',
            `${printable(run.name)} (${run.id}) is still training (its writer was alive ${ago} s ago). Nothing was deleted. Stop the training first, or pass --force to delete it anyway (its writer will then fail to store what follows).`,
          );
        }
        await s.deleteRun(run.id);
        io.out(`Deleted ${printable(run.name)} (${run.id}).\n`);
      });
    });

  program
    .command('prune')
    .description('delete runs started before a date or older than an age')
    .requiredOption('--before <date|age>', 'a date (2026-11-01) or an age: 90min, 12h, 30d, 2w')
    .option('--dry-run', 'list what would be deleted, and delete nothing')
    .action(async (o: { before: string; dryRun?: boolean }) => {
      const before = parseBefore(o.before);
      const plural = (n: number): string => `${n} run${n === 1 ? '' : 's'}`;
      await withStore(db(), o.dryRun === true, async (s) => {
        const old = (await s.runs({ limit: 1_000_000 })).filter((r) => r.created_at < before);
        // A live run is never pruned, however old: its writer is still sending.
        const live = old.filter((r) => r.status === 'running');
        const doomed = old.filter((r) => r.status !== 'running');
        let deleted = doomed.map((r) => r.id);
        if (o.dryRun === true) io.out(`Would delete ${plural(doomed.length)} started before ${fmtTime(before)} (dry run: nothing deleted)${doomed.length > 0 ? ':' : '.'}\n`);
        else {
          deleted = await s.prune(before);
          io.out(`Deleted ${plural(deleted.length)} started before ${fmtTime(before)}${deleted.length > 0 ? ':' : '.'}\n`);
        }
        for (const r of doomed) if (deleted.includes(r.id)) io.out(`  ${printable(r.name)} (${r.id}, ${r.status})\n`);
        if (live.length > 0) {
          io.out(`Kept ${plural(live.length)} still training: ${live.map((r) => `${printable(r.name)} (${r.id})`).join(', ')}.\n`);
        }
      });
    });

  program
    .command('analyze')
    .description('recompute phases, markers and advice from the stored windows with other settings')
    .argument('<run>', 'run id, unique id prefix, or name')
    .option('--boundary-db <dB>', `drift/diffusion boundary of the displacement ratio (default ${PHASE_DEFAULTS.boundaryDb})`, num('--boundary-db', P.boundaryDb))
    .option('--k <sigma>', `CUSUM allowance in noise units, ≥ 0 (default ${PHASE_DEFAULTS.k})`, num('--k', P.k))
    .option('--h <sigma>', `CUSUM decision interval in noise units, > 0 (default ${PHASE_DEFAULTS.h})`, num('--h', P.h))
    .option('--clip <sigma>', `clip standardised inputs at ±clip, > 0 (default ${PHASE_DEFAULTS.clip})`, num('--clip', P.clip))
    .option('--noise-db <dB>', `assumed noise of the phase level before an estimate exists, > 0 (default ${PHASE_DEFAULTS.noiseDb})`, num('--noise-db', P.noiseDb))
    .option('--network-share <share>', "follow the layers instead of the network's own level: share of parameters in diffusion for the network to diffuse, 0 to 1 (default 0: own level)", num('--network-share', P.networkShare))
    .option('--patience <values>', `values of the watched quantity in the trend test, an integer ≥ 5 (default ${ADVICE_DEFAULTS.patience}; stop uses twice)`, num('--patience', A.patience))
    .option('--min-gain <share>', `smallest gain from doubling the training worth having, as a share of what is left, in (0, 1) (default ${ADVICE_DEFAULTS.minGain})`, num('--min-gain', A.minGain))
    .option('--diffusion-ratio <ratio>', `diffusion length, in drift lengths, before may-stop, ≥ 0 (default ${ADVICE_DEFAULTS.diffusionRatio})`, num('--diffusion-ratio', A.diffusionRatio))
    .option('--watch <metric>', 'logged quantity the advice watches (default the validation accuracy, else val_loss, else loss)')
    .option('--write', 'store the offline markers next to the online ones (marked as offline)')
    .option('--json', 'machine-readable output')
    .action(async (ref: string, o: Record<string, number | string | boolean | undefined>) => {
      const phases = Object.fromEntries(
        (
          [
            ['boundaryDb', o.boundaryDb],
            ['k', o.k],
            ['h', o.h],
            ['clip', o.clip],
            ['noiseDb', o.noiseDb],
            ['networkShare', o.networkShare],
          ] as const
        ).filter(([, v]) => v !== undefined),
      );
      const advice = Object.fromEntries(
        (
          [
            ['patience', o.patience],
            ['minGain', o.minGain],
            ['diffusionRatio', o.diffusionRatio],
            ['watch', o.watch],
          ] as const
        ).filter(([, v]) => v !== undefined),
      );
      await withStore(db(), !o.write, async (s) => {
        const run = await s.resolveRun(ref);
        const result = await analyzeRun(s, run.id, phases, advice);
        if (o.write) await s.append(offlineMarkers(result, { phases, advice }).map((marker) => ({ type: 'marker' as const, marker })));
        if (o.json) io.out(`${JSON.stringify({ ...result, caution: CAUTION }, null, 2)}\n`);
        else io.out(`${renderAnalysis(run, result, Boolean(o.write))}\n`);
      });
    });

  program
    .command('serve')
    .description('serve the store over HTTP and WebSocket: the API, the live stream, remote ingest and /metrics')
    .option('--port <port>', 'port to listen on (default 7341; 0: any free port)', num('--port', { type: 'number', integer: true, min: 0, max: 65535 }))
    .option('--host <address>', 'address to listen on (default 127.0.0.1; any other needs --token)')
    .option('--token <token>', 'required on every request and connection (default: $TIDEMARK_TOKEN, else none)')
    .option('--insecure', 'listen beyond loopback without a token')
    .option('--cors <origin>', 'let pages of this origin call the API')
    .option('--ingest-rate <n>', 'batches a second one writer may send (default 200)', num('--ingest-rate', SERVER_RULES.ingestRate))
    .action(async (o: { port?: number; host?: string; token?: string; insecure?: boolean; cors?: string; ingestRate?: number }) => {
      const token = o.token ?? process.env.TIDEMARK_TOKEN ?? null;
      const fresh = !checkStorePath(db(), true);
      const running = await startServer({
        db: db(),
        ...(o.port !== undefined ? { port: o.port } : {}),
        ...(o.host !== undefined ? { host: o.host } : {}),
        token: token === '' ? null : token,
        insecure: o.insecure === true,
        cors: o.cors ?? null,
        ...(o.ingestRate !== undefined ? { ingestRate: o.ingestRate } : {}),
        onWarning: (m) => io.err(`${m}\n`),
        onError: (e) => io.err(`tidemark serve: ${(e as Error).stack ?? String(e)}\n`),
      });
      io.out(`tidemark serving ${db()} at ${running.url}\n`);
      if (fresh) io.out(`  ${db()} did not exist: this is a new, empty store (runs that write to it, or to the ingest address, will appear).\n`);
      // With a token, the page link carries it (the page sends it on every request), so the printed link opens.
      const pageLink = token !== null && token !== '' ? `${running.url}/?token=${encodeURIComponent(token)}` : `${running.url}/`;
      io.out(`  page ${pageLink}   metrics ${running.url}/metrics   ingest ${running.url.replace(/^http/, 'ws')}/ingest\n`);
      await new Promise<void>((resolve) => {
        const stop = (): void => {
          process.off('SIGINT', stop);
          process.off('SIGTERM', stop);
          resolve();
        };
        process.on('SIGINT', stop);
        process.on('SIGTERM', stop);
      });
      await running.close();
      io.out('tidemark serve: stopped\n');
    });

  program
    .command('group')
    .description('the runs of a group together: when each layer began to diffuse across runs, the spread of the gradient SNR, the advice each reached')
    .argument('<name>', 'the group (monitor option group)')
    .option('--sweep <tag>', 'a numeric tag as x (depth, batch size, …): fit the outcome as a power law of it')
    .addOption(new Option('--outcome <outcome>', "the sweep's y (default diffusion-start)").choices([...SWEEP_OUTCOMES]))
    .addOption(new Option('--align <axis>', 'put the runs on steps or on epochs (default step)').choices([...GROUP_ALIGNS]))
    .option('--loss-target <loss>', 'a training loss: where each run first reached it (the loss-target outcome)', parseLossTarget)
    .option('--json', 'machine-readable output')
    .action(async (name: string, o: { json?: boolean; sweep?: string; outcome?: SweepOutcome; align?: GroupAlign; lossTarget?: number }) => {
      await withStore(db(), true, async (s) => {
        const report = await groupReport(s, name, { ...(o.align !== undefined && { align: o.align }), ...(o.lossTarget !== undefined && { lossTarget: o.lossTarget }) });
        if (report === null) {
          throw new TidemarkError('TIDEMARK_ERR_RUN_NOT_FOUND', `No run is in group ${JSON.stringify(name)}; 'tidemark runs' lists the runs with their groups.`);
        }
        const sweep = o.sweep === undefined ? null : sweepOf(report, o.sweep, o.outcome ?? 'diffusion-start');
        if (o.json) io.out(`${JSON.stringify({ ...report, sweep, caution: CAUTION }, null, 2)}\n`);
        else io.out(`${renderGroup(report)}\n${sweep === null ? '' : `\n${renderSweep(sweep)}\n`}`);
      });
    });

  program
    .command('summary')
    .description('runs in a JSON Lines file, with their latest per-layer numbers')
    .argument('<file>', 'JSON Lines file written with store: "*.jsonl"')
    .action(async (file: string) => {
      const runs = await summarizeJsonl(file);
      if (runs.length === 0) io.out('No runs in this file.\n');
      for (const s of runs) io.out(`${renderSummary(s)}\n\n`);
      if (runs.length > 0) io.out(`${CAUTION}\n`);
    });

  return program;
}

/** Runs the command line; returns the exit code. */
export async function main(argv: string[], io: Io = { out: (s) => process.stdout.write(s), err: (s) => process.stderr.write(s) }): Promise<number> {
  const program = buildProgram(io);
  try {
    await program.parseAsync(argv, { from: 'user' });
    return EXIT.ok;
  } catch (e) {
    if (e instanceof CommanderError) {
      if (e.code === 'commander.helpDisplayed' || e.code === 'commander.version' || e.code === 'commander.help') return EXIT.ok;
      return EXIT.usage;
    }
    const code = (e as { code?: string }).code;
    if (code === 'TIDEMARK_ERR_RUN_NOT_FOUND' || code === 'TIDEMARK_ERR_RUN_AMBIGUOUS') {
      io.err(`tidemark: ${(e as Error).message}\n`);
      return EXIT.notFound;
    }
    if (e instanceof TidemarkTypeError || e instanceof TidemarkRangeError) {
      io.err(`tidemark: ${e.message}\n`);
      return EXIT.usage;
    }
    if (e instanceof TidemarkError) {
      io.err(`tidemark: ${e.message} [${e.code}]\n`);
      return EXIT.failed;
    }
    io.err(`tidemark: ${(e as Error).message ?? String(e)}\n`);
    return EXIT.failed;
  }
}
