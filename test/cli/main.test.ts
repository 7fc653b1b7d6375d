import { spawn, spawnSync } from 'node:child_process';
import { mkdtempSync, readFileSync, rmSync, writeFileSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { parse } from 'csv-parse/sync';
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import { EXIT, main, parseBefore } from '../../src/cli/main.js';
import { monitor } from '../../src/index.js';
import { startServer } from '../../src/server/serve.js';
import { openStore } from '../../src/storage/sqlite-store.js';
import { blobTensors, denseModel, tf, useCpu } from '../helpers/tf.js';
import { BUILT_BIN, builtCli } from '../helpers/cli.js';
import { fakeRun, fakeWindows } from '../helpers/window-records.js';

const dir = mkdtempSync(join(tmpdir(), 'tidemark-cli-'));
afterAll(() => rmSync(dir, { recursive: true, force: true }));

async function run(...args: string[]) {
  let out = '';
  let err = '';
  const code = await main(args, { out: (s) => void (out += s), err: (s) => void (err += s) });
  return { code, out, err };
}

const db = join(dir, 'runs.db');

/** A small two-class run (lr 0.2, windows of 4, batch 16, fit's shuffle off) trained into a store; its monitor. */
async function trainInto(file: string, run: string, samples: number, epochs: number) {
  const { xs, ys } = blobTensors(samples, 4, 2);
  const model = denseModel({ inputs: 4, hidden: [6], outputs: 2, lr: 0.2 });
  const mon = await monitor(model, { store: file, run, window: 4 });
  await model.fit(xs, ys, { epochs, batchSize: 16, shuffle: false, verbose: 0, callbacks: [mon.callback] });
  await mon.close();
  tf.dispose([xs, ys]);
  return mon;
}
const jsonl = join(dir, 'runs.jsonl');
const runIds: string[] = [];

beforeAll(async () => {
  await useCpu();
  const { xs, ys } = blobTensors(64, 4, 2);
  for (const [name, store, group] of [
    ['alpha "quoted"\nrun', db, 'sweep'],
    ['beta', db, 'other'],
    ['gamma', jsonl, 'sweep'],
  ] as const) {
    const model = denseModel({ inputs: 4, hidden: [6], outputs: 2 });
    const mon = await monitor(model, { store, run: name, window: 4, group, tags: { seed: name.slice(0, 1) } });
    await model.fit(xs, ys, { epochs: 2, batchSize: 8, shuffle: false, verbose: 0, callbacks: [mon.callback] });
    await mon.close();
    runIds.push(mon.runId);
  }
  tf.dispose([xs, ys]);
});

describe('tidemark runs', () => {
  it('lists runs with their status and filters by group and tag', async () => {
    const all = await run('runs', '--db', db);
    expect(all.code).toBe(EXIT.ok);
    expect(all.out).toContain('alpha "quoted"\\nrun');
    expect(all.out).toContain('beta');
    expect(all.out).toContain('finished');
    const sweep = await run('runs', '--db', db, '--group', 'sweep', '--json');
    const rows = JSON.parse(sweep.out) as { id: string; windows: number; last_step: number }[];
    expect(rows.map((r) => r.id)).toEqual([runIds[0]]);
    expect(rows[0]).toMatchObject({ windows: 4, last_step: 16 });
    const tagged = JSON.parse((await run('runs', '--db', db, '--tag', 'seed=b', '--json')).out) as { id: string }[];
    expect(tagged.map((r) => r.id)).toEqual([runIds[1]]);
  });

  it('refuses a bad status with a usage error', async () => {
    const r = await run('runs', '--db', db, '--status', 'sleeping');
    expect(r.code).toBe(EXIT.usage);
    expect(r.err).toContain('sleeping');
  });
});

describe('tidemark show', () => {
  it('prints the latest per-layer numbers, the markers and the caution', async () => {
    const r = await run('show', 'beta', '--db', db);
    expect(r.code).toBe(EXIT.ok);
    expect(r.out).toContain(runIds[1]);
    expect(r.out).toContain('windows  4, last at step 16');
    expect(r.out).toContain('(network)');
    expect(r.out).toContain('SNR dB');
    expect(r.out).toContain('level dB');
    expect(r.out).toContain('confirm any decision to stop training on held-out data');
    // The table's SNR for the network equals the stored series value.
    const store = openStore(db, { readonly: true });
    const snr = store.series(runIds[1]!, 'grad_snr_db', { layer: null }).at(-1)!.value;
    const noise = store.series(runIds[1]!, 'noise_scale', { layer: null, last: 1 })[0]!;
    store.close();
    expect(r.out).toMatch(new RegExp(`\\(network\\)\\s+${(snr >= 0 ? '\\+' : '') + snr.toFixed(1).replace('.', '\\.')}`));
    // The noise scale column shows the latest measured value with its step, not the last window's.
    expect(r.out).toContain(`${noise.value.toFixed(1)} (${noise.step})`);
  });

  it('finds a run by unique id prefix and says which runs match an ambiguous one', async () => {
    expect((await run('show', runIds[0]!.slice(0, 8), '--db', db, '--json')).code).toBe(EXIT.ok);
    const missing = await run('show', 'no-such-run', '--db', db);
    expect(missing.code).toBe(EXIT.notFound);
    expect(missing.err).toContain('no-such-run');
  });
});

describe('tidemark export and import', () => {
  it('writes CSV that a general-purpose parser reads back (RFC 4180, csv-parse)', async () => {
    const out = join(dir, 'beta.csv');
    expect((await run('export', 'beta', '--db', db, '--format', 'csv', '--out', out)).code).toBe(EXIT.ok);
    const rows = parse(readFileSync(out, 'utf8'), { columns: true }) as Record<string, string>[];
    expect(rows.length).toBeGreaterThan(0);
    const store = openStore(db, { readonly: true });
    const windows = store.windows(runIds[1]!);
    store.close();
    expect(new Set(rows.map((r) => r.step)).size).toBe(windows.length);
  });

  it('round-trips a run through JSON Lines into another store', async () => {
    const out = join(dir, 'alpha.jsonl');
    expect((await run('export', runIds[0]!, '--db', db, '--format', 'jsonl', '--out', out)).code).toBe(EXIT.ok);
    const other = join(dir, 'other.db');
    const imp = await run('import', out, '--db', other);
    expect(imp.code).toBe(EXIT.ok);
    expect(imp.out).toContain(runIds[0]);
    const a = openStore(db, { readonly: true });
    const b = openStore(other, { readonly: true });
    expect(b.windows(runIds[0]!)).toEqual(a.windows(runIds[0]!));
    expect(b.resolveRun(runIds[0]!).name).toBe('alpha "quoted"\nrun');
    a.close();
    b.close();
  });

  it('rejects a missing --format', async () => {
    expect((await run('export', 'beta', '--db', db)).code).toBe(EXIT.usage);
  });
});

describe('tidemark delete and prune', () => {
  it('deletes a run, and prunes runs started before a date', async () => {
    const copy = join(dir, 'copy.db');
    expect((await run('import', join(dir, 'alpha.jsonl'), '--db', copy)).code).toBe(EXIT.ok);
    const del = await run('delete', runIds[0]!.slice(0, 6), '--db', copy);
    expect(del.code).toBe(EXIT.ok);
    expect(JSON.parse((await run('runs', '--db', copy, '--json')).out)).toEqual([]);
    const none = await run('prune', '--before', '2000-01-01', '--db', db);
    expect(none.out).toContain('Deleted 0 runs');
    const all = await run('prune', '--before', new Date(Date.now() + 60_000).toISOString(), '--db', db);
    expect(all.out).toContain('Deleted 2 runs');
  });

  it('refuses to delete a run that is still training unless forced, and prune keeps it and says so', async () => {
    const file = join(dir, 'live.db');
    const store = openStore(file);
    const live = fakeRun({ id: 'live-run-0001', started_at: Date.now() - 3_600_000 });
    const old = fakeRun({ id: 'old-run-0001', started_at: Date.now() - 3_600_000 });
    store.beginRun(live);
    store.beginRun(old);
    store.append([{ type: 'end', run: old.id, status: 'finished', step: 0, time: Date.now() - 3_500_000 }]);
    store.heartbeat(live.id);
    store.close();
    const refused = await run('delete', live.id, '--db', file);
    expect(refused.code).toBe(EXIT.failed);
    expect(refused.err).toContain('is still training');
    expect(refused.err).toContain('TIDEMARK_ERR_RUN_LIVE');
    const dry = await run('prune', '--before', '30min', '--dry-run', '--db', file);
    expect(dry.out).toContain('Would delete 1 run started before');
    expect(dry.out).toContain('(old-run-0001, finished)');
    expect(dry.out).toContain('Kept 1 run still training');
    expect(JSON.parse((await run('runs', '--db', file, '--json')).out)).toHaveLength(2);
    const pruned = await run('prune', '--before', '30min', '--db', file);
    expect(pruned.out).toContain('Deleted 1 run started before');
    expect(pruned.out).toContain('Kept 1 run still training: ');
    expect((await run('delete', live.id, '--db', file, '--force')).code).toBe(EXIT.ok);
    expect(JSON.parse((await run('runs', '--db', file, '--json')).out)).toEqual([]);
  });

  it('refuses an incomplete JSON Lines file unless --partial, and says when an import added nothing', async () => {
    const file = join(dir, 'cut.jsonl');
    const r = fakeRun({ id: 'cut-run-0001', started_at: 1_700_000_000_000 });
    const ws = fakeWindows(r, 10, 2);
    writeFileSync(file, [{ type: 'run', run: r }, ...ws.map((window) => ({ type: 'window', window }))].map((x) => JSON.stringify(x)).join('\n') + '\n{"type":"wind');
    const copy = join(dir, 'cut.db');
    const refused = await run('import', file, '--db', copy);
    expect(refused.code).toBe(EXIT.failed);
    expect(refused.err).toContain('is incomplete: its last line is cut off; run cut-run-0001 has no end record');
    expect(refused.err).toContain('Nothing was imported');
    const partial = await run('import', file, '--db', copy, '--partial');
    expect(partial.code).toBe(EXIT.ok);
    expect(partial.out).toBe('Imported run cut-run-0001: 10 new windows of 10 in the file (no end record: reads as interrupted).\nThe last line was cut off and was skipped.\n');
    const again = await run('import', file, '--db', copy, '--partial');
    expect(again.out).toContain('Imported run cut-run-0001: already in the store, nothing new');
  });

  it('reads dates and ages for --before', () => {
    const now = Date.parse('2026-12-02T00:00:00Z');
    expect(parseBefore('30d', now)).toBe(now - 30 * 86_400_000);
    expect(parseBefore('90min', now)).toBe(now - 90 * 60_000);
    expect(parseBefore('2w', now)).toBe(now - 14 * 86_400_000);
    // '10m' reads as months to many and as minutes to others: refused with the units that exist.
    expect(() => parseBefore('10m', now)).toThrow("--before: 'm' is not a unit of age (minutes or months?); use min, h, d or w");
    expect(parseBefore('2026-11-01', now)).toBe(Date.parse('2026-11-01'));
    expect(() => parseBefore('last tuesday', now)).toThrow(/--before/);
  });
});

describe('tidemark summary', () => {
  it('summarises the runs of a JSON Lines store', async () => {
    const r = await run('summary', jsonl);
    expect(r.code).toBe(EXIT.ok);
    expect(r.out).toContain('gamma');
    expect(r.out).toContain('finished, 4 windows');
    // K = 4 of M = 8 minibatches per epoch: floor sqrt((1 − K/M)/K) = 0.354, −9.0 dB (methods.md §1.4).
    expect(r.out).toContain('SNR floor -9.0 dB');
  });
});

describe('tidemark binary', () => {
  it('prints its version and exits 2 on an unknown command', () => {
    const cli = (...args: string[]) => spawnSync(process.execPath, ['--import', 'tsx', 'src/cli/bin.ts', ...args], { encoding: 'utf8' });
    const pkg = JSON.parse(readFileSync('package.json', 'utf8')) as { version: string };
    expect(cli('--version')).toMatchObject({ status: 0, stdout: `${pkg.version}\n` });
    const bad = cli('frobnicate');
    expect(bad.status).toBe(2);
    expect(bad.stderr).toContain("unknown command 'frobnicate'");
  });
});

describe('tidemark analyze', () => {
  it('reproduces the online markers with the same settings, and writes offline ones only with --write', async () => {
    const file = join(dir, 'analyze.db');
    const mon = await trainInto(file, 'to-analyze', 256, 12);
    const online = mon.markers().filter((m) => m.kind === 'drift-start' || m.kind === 'diffusion-start');
    expect(online.length).toBeGreaterThan(0);

    const same = await run('analyze', 'to-analyze', '--db', file, '--json');
    expect(same.code).toBe(EXIT.ok);
    const r = JSON.parse(same.out) as { added: unknown[]; missing: unknown[]; matched: { stepShift: number }[] };
    expect(r.added).toEqual([]);
    expect(r.missing).toEqual([]);
    expect(r.matched.length).toBe(online.length);
    expect(r.matched.every((m) => m.stepShift === 0)).toBe(true);

    const text = await run('analyze', 'to-analyze', '--db', file, '--h', '8');
    expect(text.code).toBe(EXIT.ok);
    expect(text.out).toContain('re-analysed');
    expect(text.out).toContain('Nothing written');
    const before = openStore(file, { readonly: true });
    const count = before.markers(mon.runId).length;
    before.close();

    const write = await run('analyze', 'to-analyze', '--db', file, '--h', '8', '--write');
    expect(write.out).toContain('Offline markers written');
    const after = openStore(file, { readonly: true });
    const stored = after.markers(mon.runId);
    after.close();
    expect(stored.length).toBeGreaterThan(count);
    // The online markers stay as they were; the offline ones come in addition.
    expect(stored.filter((m) => m.details.source !== 'offline').length).toBe(count);
    expect(stored.some((m) => m.details.source === 'offline')).toBe(true);
    // show tells the online markers from the offline ones, and gives each advice marker its verdict.
    const shown = await run('show', 'to-analyze', '--db', file);
    const markerLines = shown.out.split('\n').filter((l) => /^\s+(drift-start|diffusion-start|advice)\s/.test(l));
    expect(markerLines.some((l) => /\sonline(\s|$)/.test(l))).toBe(true);
    expect(markerLines.some((l) => /\soffline(\s|$)/.test(l))).toBe(true);
    for (const l of markerLines.filter((x) => x.trim().startsWith('advice'))) expect(l).toMatch(/(continue|may-stop|stop)( \([a-z-]+\))?\s*$/);
  });
});

describe('tidemark analyze: settings are range-checked (the built command)', () => {
  const cli = builtCli;
  let file = '';
  beforeAll(async () => {
    file = join(dir, 'ranges.db');
    await trainInto(file, 'ranges', 128, 3);
  });

  it.each([
    ['--network-share', '2', '--network-share must be a number from 0 to 1'],
    ['--network-share', '-1', '--network-share must be a number from 0 to 1'],
    ['--h', '-1', '--h must be a number > 0'],
    ['--clip', '0', '--clip must be a number > 0'],
    ['--patience', '0', '--patience must be an integer from 5 to 100000'],
    ['--diffusion-ratio', '-1', '--diffusion-ratio must be a number from 0 to 1000'],
    ['--min-gain', '-5', '--min-gain must be a number > 0 and < 1'],
    ['--k', 'abc', "--k must be a number ≥ 0; received 'abc'"],
  ])('refuses %s %s with the usage code and the range', (flag, value, message) => {
    const r = cli('analyze', 'ranges', '--db', file, flag, value);
    expect(r.status).toBe(EXIT.usage);
    expect(r.stderr).toContain(message);
    expect(r.stderr).not.toContain('Cannot read properties');
  });

  it('refuses a watched quantity the run never logged, naming what it did log', () => {
    const r = cli('analyze', 'ranges', '--db', file, '--watch', 'los');
    expect(r.status).toBe(EXIT.usage);
    expect(r.stderr).toContain("--watch 'los' is not in this run's logs (did you mean 'loss'?); logged: loss");
  });

  it('refuses --limit that is not a positive integer', () => {
    const r = cli('runs', '--db', file, '--limit', 'abc');
    expect(r.status).toBe(EXIT.usage);
    expect(r.stderr).toContain("--limit must be an integer from 1 to 1000000; received 'abc'");
  });
});

describe('messages for a wrong path or address (the built command)', () => {
  const cli = builtCli;

  it('says there is no store at a path that does not exist, and creates nothing', () => {
    const missing = join(dir, 'nothing-here.db');
    const r = cli('runs', '--db', missing);
    expect(r.status).toBe(EXIT.failed);
    expect(r.stderr).toContain(`There is no store at ${missing}. A monitored training run creates one`);
    expect(r.stderr).not.toContain('SQLITE_');
    expect(() => readFileSync(missing)).toThrow();
  });

  it('says a directory is a directory', () => {
    const r = cli('runs', '--db', dir);
    expect(r.status).toBe(EXIT.failed);
    expect(r.stderr).toContain(`${dir} is a directory, not a store file`);
  });

  it('says why export --out cannot write a directory', () => {
    const file = join(dir, 'one.db');
    const store = openStore(file);
    const one = fakeRun({ id: 'one-run-0001' });
    store.beginRun(one);
    store.close();
    const r = cli('export', one.id, '--db', file, '--format', 'csv', '--out', dir);
    expect(r.status).toBe(EXIT.failed);
    expect(r.stderr).toContain(`Could not write ${dir} (it is a directory: give a file name`);
    expect(r.stderr).toContain('TIDEMARK_ERR_FILE_WRITE');
  });

  it('serve says when its store is new and empty, and prints the page link with its token', async () => {
    const fresh = join(dir, 'typo.db');
    const child = spawn(process.execPath, [BUILT_BIN, 'serve', '--db', fresh, '--port', '0', '--token', 'tok-en/12345'], { stdio: ['ignore', 'pipe', 'pipe'] });
    let out = '';
    child.stdout.on('data', (d: Buffer) => void (out += d.toString()));
    const deadline = Date.now() + 20_000;
    while (!out.includes('new, empty store') && Date.now() < deadline && child.exitCode === null) await new Promise((r) => setTimeout(r, 100));
    child.kill('SIGINT');
    await new Promise((r) => child.once('exit', r));
    expect(out).toContain(`${fresh} did not exist: this is a new, empty store`);
    expect(out).toMatch(/page http:\/\/127\.0\.0\.1:\d+\/\?token=tok-en%2F12345 /);
  });
});

describe('startServer on an address this machine does not have', () => {
  it('says so instead of advising another port', async () => {
    const store = openStore(':memory:');
    try {
      // 192.0.2.1 is TEST-NET-1 (RFC 5737): never assigned to a machine.
      await expect(startServer({ store, host: '192.0.2.1', port: 0, token: 'a-long-enough-token' })).rejects.toMatchObject({
        code: 'TIDEMARK_ERR_SERVE_LISTEN',
        message: expect.stringContaining('192.0.2.1 is not an address of this machine') as unknown,
      });
    } finally {
      store.close();
    }
  });
});
