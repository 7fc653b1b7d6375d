import { mkdtempSync, readFileSync, rmSync, writeFileSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { afterAll, describe, expect, it } from 'vitest';
import { decodeRecord, encodeRecord, JsonlSink, type RunInfo, type SinkRecord } from '../../src/index.js';

const dir = mkdtempSync(join(tmpdir(), 'tidemark-jsonl-'));
afterAll(() => rmSync(dir, { recursive: true, force: true }));

const run: RunInfo = { id: 'r1', name: 'n', group: null, tags: {}, started_at: 0, config: {}, layers: [] };
const warning = (i: number): SinkRecord => ({ type: 'warning', run: 'r1', code: 'X', message: `m${i}`, step: i, time: i });

describe('JSON Lines sink', () => {
  it('round-trips NaN and infinities, which plain JSON cannot hold', () => {
    const rec: SinkRecord = { type: 'end', run: 'a"b\nc', status: 'finished', step: Number.NaN, time: -Infinity };
    const line = encodeRecord(rec);
    expect(line).not.toContain('\n');
    const back = decodeRecord(line) as Extract<SinkRecord, { type: 'end' }>;
    expect(back.run).toBe('a"b\nc');
    expect(back.step).toBeNaN();
    expect(back.time).toBe(-Infinity);
  });

  it('writes one line per record, in order, after close', async () => {
    const file = join(dir, 'nested', 'a.jsonl');
    const sink = new JsonlSink(file, { flushAt: 3, flushIntervalMs: 10_000 });
    await sink.open(run);
    for (let i = 0; i < 10; i++) sink.write(warning(i));
    await sink.close();
    const lines = readFileSync(file, 'utf8').trim().split('\n');
    expect(lines.map((l) => (decodeRecord(l) as { step: number }).step)).toEqual([0, 1, 2, 3, 4, 5, 6, 7, 8, 9]);
  });

  it('keeps failed records queued up to its bound and counts what it drops', async () => {
    const file = join(dir, 'b.jsonl');
    const errors: unknown[] = [];
    const sink = new JsonlSink(file, { flushAt: 1_000_000, flushIntervalMs: 10_000, maxQueued: 5, onError: (e) => errors.push(e) });
    await sink.open(run);
    // Close the descriptor under the sink, so its next write fails.
    await (sink as unknown as { handle: { close(): Promise<void> } }).handle.close();
    for (let i = 0; i < 8; i++) sink.write(warning(i));
    await expect(sink.flush()).rejects.toThrow();
    expect(sink.dropped).toBe(3);
  });

  it('rejects open() on a location that cannot hold the file', async () => {
    // A regular file cannot have children, whoever runs the test (root ignores permission bits).
    const blocker = join(dir, 'plain-file');
    writeFileSync(blocker, 'x');
    await expect(new JsonlSink(join(blocker, 'c.jsonl')).open(run)).rejects.toThrow(/ENOTDIR|EEXIST/);
  });
});

describe('JsonlSink options', () => {
  it('suggests the option meant for a misspelt name, and refuses out-of-range values', () => {
    expect(() => new JsonlSink('x.jsonl', { flushIntervall: 5 } as never)).toThrow(
      "Unknown option 'flushIntervall' of new JsonlSink(). Did you mean 'flushIntervalMs'?",
    );
    expect(() => new JsonlSink('x.jsonl', { flushIntervalMs: 0 })).toThrow(/flushIntervalMs' of new JsonlSink\(\) must be an integer from 1/);
    expect(() => new JsonlSink('x.jsonl', { flushAt: 2.5 })).toThrow(/flushAt' of new JsonlSink\(\) must be an integer ≥ 1; received 2.5/);
    expect(() => new JsonlSink('', {})).toThrow(/path must be a non-empty string/);
  });
});
