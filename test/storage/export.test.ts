import { appendFileSync, mkdtempSync, readFileSync, rmSync, writeFileSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { parse } from 'csv-parse/sync';
import { afterAll, afterEach, describe, expect, it } from 'vitest';
import { TidemarkError, TidemarkTypeError } from '../../src/errors.js';
import type { LayerStats, RunInfo, SinkRecord, VariableStats, WindowRecord } from '../../src/protocol/records.js';
import { CSV_WINDOW_COLUMNS, exportLines, exportRun, importJsonl, runInfoOf } from '../../src/storage/export.js';
import { JsonlSink } from '../../src/storage/jsonl-sink.js';
import { decodeRecord } from '../../src/storage/sink.js';
import { openStore, type SqliteStore } from '../../src/storage/sqlite-store.js';
import type { RunDetail } from '../../src/storage/store.js';
import { fakeMarkers, fakeRun, fakeWindows } from '../helpers/window-records.js';

const dir = mkdtempSync(join(tmpdir(), 'tidemark-export-'));
afterAll(() => rmSync(dir, { recursive: true, force: true }));

const open: SqliteStore[] = [];
afterEach(() => {
  for (const s of open.splice(0)) s.close();
});
let n = 0;
function store(): SqliteStore {
  const s = openStore(join(dir, `e${n++}.db`));
  open.push(s);
  return s;
}

/** A run whose names need CSV quoting: commas, quotes, a line break (RFC 4180 §2.6–2.7). */
function awkwardRun(id: string): RunInfo {
  const run = fakeRun({ id, name: 'export, "quoted"\nrun', tags: { seed: '7' }, group: 'g' });
  run.layers[1]!.name = 'dense, "two"\r\nlines';
  run.layers[1]!.variables = run.layers[1]!.variables.map((v) => ({ ...v, name: v.name.replace('dense_Dense2', 'dense, "two"\r\nlines') }));
  return run;
}

function filled(s: SqliteStore, run: RunInfo, windows = 12): { ws: WindowRecord[]; records: SinkRecord[] } {
  const ws = fakeWindows(run, windows);
  const records: SinkRecord[] = [
    { type: 'run', run },
    ...ws.map((window): SinkRecord => ({ type: 'window', window })),
    ...fakeMarkers(run).map((marker): SinkRecord => ({ type: 'marker', marker })),
    { type: 'warning', run: run.id, code: 'TIDEMARK_ERR_NONFINITE', message: 'NaN gradients, "dense_Dense2"', step: 24, time: 5 },
    { type: 'end', run: run.id, status: 'failed', step: ws.at(-1)!.step, time: run.started_at + 60_000 },
  ];
  s.append(records);
  return { ws, records };
}

/** Everything but the heartbeat, which records when a writer was last alive, not what the run was. */
function comparable(r: RunDetail): Omit<RunDetail, 'heartbeat_at'> {
  const { heartbeat_at: _h, ...rest } = r;
  return rest;
}

describe('CSV export', () => {
  it('is read back by csv-parse (the reference RFC 4180 parser) to exactly the stored values', async () => {
    const s = store();
    const run = awkwardRun('csv-run-0001');
    const { ws } = filled(s, run);
    const text = await exportRun(s, run.id, 'csv');
    // RFC 4180 §2.1: every record ends in CRLF, including the last.
    expect(text.endsWith('\r\n')).toBe(true);
    const rows = parse(text, { columns: true }) as Record<string, string>[];

    const metrics = ['grad_mean_norm', 'grad_std_norm', 'grad_snr', 'grad_snr_db', 'noise_scale', 'weight_norm', 'weight_travel', 'update_ratio', 'nonfinite', 'batches', 'params', 'travel_exponent'];
    const header = Object.keys(rows[0]!);
    expect(header).toEqual([...CSV_WINDOW_COLUMNS, ...metrics, 'loss', 'acc', 'val_loss']);

    // Expected rows built independently: network, then each layer followed by its variables.
    const expected: { w: WindowRecord; scope: string; layer: string; variable: string; stats: VariableStats | LayerStats }[] = [];
    for (const w of ws) {
      expected.push({ w, scope: 'network', layer: '', variable: '', stats: w.network });
      for (const l of run.layers) {
        const stats = w.layers[l.name]!;
        expected.push({ w, scope: 'layer', layer: l.name, variable: '', stats });
        for (const v of l.variables) expected.push({ w, scope: 'variable', layer: l.name, variable: v.name, stats: stats.variables![v.name]! });
      }
    }
    expect(rows).toHaveLength(expected.length);
    // An empty field is a missing value; anything else must read back, through Number(), to the same double.
    const value = (field: string): number | null => (field === '' ? null : Number(field));
    rows.forEach((row, i) => {
      const e = expected[i]!;
      expect([row.run, row.scope, row.layer, row.variable]).toEqual([run.id, e.scope, e.layer, e.variable]);
      expect(value(row.window!)).toBe(e.w.index);
      expect(value(row.step!)).toBe(e.w.step);
      expect(value(row.first_step!)).toBe(e.w.first_step);
      // Epochs count from 1 in the CSV, as in fit's progress lines and `summary`; the record keeps fit's index.
      expect(value(row.epoch!)).toBe(e.w.epoch == null ? null : e.w.epoch + 1);
      expect(value(row.window_batches!)).toBe(e.w.batches);
      expect(value(row.batches_per_epoch!)).toBe(e.w.batches_per_epoch);
      expect(JSON.parse(row.pass_batches!)).toEqual(e.w.pass_batches);
      expect(value(row.snr_floor!)).toBe(e.w.snr_floor);
      expect(value(row.time!)).toBe(e.w.time);
      for (const m of metrics) {
        const want = (e.stats as unknown as Record<string, number | null | undefined>)[m] ?? null;
        expect(Object.is(value(row[m]!), want), `${m} of row ${i}: ${row[m]} vs ${want}`).toBe(true);
      }
      for (const log of ['loss', 'acc', 'val_loss']) {
        expect(Object.is(value(row[log]!), e.w.logs[log] ?? null)).toBe(true);
      }
    });
    // The awkward values really were there.
    expect(rows.some((r) => r.update_ratio === 'NaN')).toBe(true);
    expect(rows.some((r) => r.grad_snr === 'Infinity')).toBe(true);
    expect(rows.some((r) => r.grad_snr_db === '-Infinity')).toBe(true);
    expect(rows.some((r) => r.layer === 'dense, "two"\r\nlines')).toBe(true);
  });

  it('prefixes a logged metric whose name clashes with a column', async () => {
    const s = store();
    const run = fakeRun({ id: 'clash-0001', layers: 1 });
    s.beginRun(run);
    const ws = fakeWindows(run, 2, 1, false);
    for (const w of ws) w.logs.step = 99;
    s.append(ws.map((window): SinkRecord => ({ type: 'window', window })));
    const rows = parse(await exportRun(s, run.id, 'csv'), { columns: true }) as Record<string, string>[];
    expect(rows[0]).toMatchObject({ step: '8', log_step: '99' });
  });
});

describe('JSON Lines export and import', () => {
  it('gives the same run back when its export is imported into another store', async () => {
    const a = store();
    const run = awkwardRun('jsonl-run-0001');
    const { records } = filled(a, run);
    const file = join(dir, 'export.jsonl');
    writeFileSync(file, await exportRun(a, run.id, 'jsonl'));
    // The export holds the same records the JSON Lines sink would have written, grouped by type.
    const lines = readFileSync(file, 'utf8').trimEnd().split('\n').map(decodeRecord);
    const order = ['run', 'window', 'marker', 'warning', 'end'];
    const sorted = (rs: SinkRecord[]) => [...rs].sort((x, y) => order.indexOf(x.type) - order.indexOf(y.type));
    expect(lines.map((r) => r.type)).toEqual(sorted(records).map((r) => r.type));
    expect(lines.filter((r) => r.type !== 'marker')).toEqual(sorted(records).filter((r) => r.type !== 'marker'));

    const b = store();
    expect((await importJsonl(b, file)).runs).toEqual([run.id]);
    expect(comparable(b.resolveRun(run.id))).toEqual(comparable(a.resolveRun(run.id)));
    expect(b.windows(run.id)).toEqual(a.windows(run.id));
    expect(b.markers(run.id)).toEqual(a.markers(run.id));
    expect(b.warnings(run.id)).toEqual(a.warnings(run.id));
    expect(runInfoOf(b.resolveRun(run.id))).toEqual(run);
    // And the second export is byte-identical to the first.
    expect(await exportRun(b, run.id, 'jsonl')).toEqual(readFileSync(file, 'utf8'));
    expect(await exportRun(b, run.id, 'csv')).toEqual(await exportRun(a, run.id, 'csv'));
  });

  it("refuses a JSON Lines sink's own file cut mid-run unless partial; then imports it, twice without doubling, and the run reads as interrupted", async () => {
    const run = fakeRun({ id: 'sink-run-0001', started_at: 1_600_000_000_000 });
    const ws = fakeWindows(run, 20, 4);
    const file = join(dir, 'sink.jsonl');
    const sink = new JsonlSink(file);
    await sink.open(run);
    sink.write({ type: 'run', run });
    for (const window of ws) sink.write({ type: 'window', window });
    await sink.close();
    // The process was killed mid-write: a torn last line.
    appendFileSync(file, '{"type":"window","window":{"run":"sink-run-0001","ind');
    const s = store();
    await expect(importJsonl(s, file)).rejects.toMatchObject({
      code: 'TIDEMARK_ERR_IMPORT_INCOMPLETE',
      message: expect.stringContaining(`its last line is cut off; run ${run.id} has no end record`) as unknown,
    });
    expect(s.runs()).toEqual([]);
    expect(await importJsonl(s, file, { partial: true })).toEqual({
      runs: [run.id],
      windows: { [run.id]: { inFile: 20, added: 20 } },
      unended: [run.id],
      tornLastLine: true,
    });
    expect((await importJsonl(s, file, { partial: true })).windows).toEqual({ [run.id]: { inFile: 20, added: 0 } });
    expect(s.windows(run.id)).toEqual(ws);
    expect(s.resolveRun(run.id)).toMatchObject({ status: 'interrupted', windows: 20, heartbeat_at: ws.at(-1)!.time, ended_at: null });
  });

  it('names the line of a malformed record, and a file that cannot be read', async () => {
    const s = store();
    const file = join(dir, 'bad.jsonl');
    writeFileSync(file, `${JSON.stringify({ type: 'run', run: fakeRun({ id: 'bad-0001' }) })}\nnot json\n{"type":"end"}\n`);
    await expect(importJsonl(s, file)).rejects.toThrow(expect.objectContaining({ code: 'TIDEMARK_ERR_RECORD_INVALID', message: expect.stringMatching(/bad\.jsonl, line 2: not a JSON record/) }));
    writeFileSync(file, `${JSON.stringify({ type: 'window', window: { run: 'nobody' } })}\n`);
    const e = await importJsonl(s, file, { partial: true }).catch((x: unknown) => x);
    expect(e).toBeInstanceOf(TidemarkTypeError);
    expect(e).toMatchObject({ code: 'TIDEMARK_ERR_RECORD_INVALID', message: expect.stringMatching(/holds records of run nobody but not its run record/) });
    const known = fakeRun({ id: 'bad-0002' });
    writeFileSync(file, `${JSON.stringify({ type: 'run', run: known })}\n${JSON.stringify({ type: 'window', window: { run: known.id } })}\n`);
    const e2 = await importJsonl(s, file, { partial: true }).catch((x: unknown) => x);
    expect(e2).toMatchObject({ code: 'TIDEMARK_ERR_RECORD_INVALID', message: expect.stringMatching(/bad\.jsonl, lines 1–2: append: record 1: window\.index must be a finite number/) });
    const missing = await importJsonl(s, join(dir, 'missing.jsonl')).catch((x: unknown) => x);
    expect(missing).toBeInstanceOf(TidemarkError);
    expect(missing).toMatchObject({ code: 'TIDEMARK_ERR_FILE_READ', message: expect.stringMatching(/could not read ".*missing\.jsonl" \(ENOENT\)/) });
  });

  it('refuses an unknown format and a run that is not an exact id', async () => {
    const s = store();
    filled(s, fakeRun({ id: 'fmt-0001', layers: 1 }), 1);
    expect(() => exportLines(s, 'fmt-0001', 'xml' as never)).toThrow(expect.objectContaining({ code: 'TIDEMARK_ERR_OPTION_INVALID', message: expect.stringMatching(/format must be 'csv' or 'jsonl'; received "xml"/) }));
    await expect(exportRun(s, 'fmt-', 'jsonl')).rejects.toMatchObject({ code: 'TIDEMARK_ERR_RUN_NOT_FOUND' });
  });
});
