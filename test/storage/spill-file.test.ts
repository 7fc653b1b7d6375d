/**
 * The spill file alone, on a batch log and a temporary directory: what it writes (one batch frame per
 * line, exactly as it would be sent), reading back, removal once unused, the rewrite at close, failures.
 */
import { existsSync, mkdtempSync, readFileSync, rmSync, writeFileSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { basename, join } from 'node:path';
import { afterAll, describe, expect, it } from 'vitest';
import type { BatchMessage } from '../../src/protocol/messages.js';
import type { SinkRecord } from '../../src/protocol/records.js';
import { BatchLog, type Batch } from '../../src/storage/batch-log.js';
import { decodeRecord } from '../../src/storage/sink.js';
import { SpillFile, spillFilePath } from '../../src/storage/spill-file.js';

const root = mkdtempSync(join(tmpdir(), 'tidemark-spill-test-'));
afterAll(() => rmSync(root, { recursive: true, force: true }));
let n = 0;
const freshDir = () => join(root, `d${n++}`);

const warnings = (from: number, count: number): SinkRecord[] =>
  Array.from({ length: count }, (_, i) => ({ type: 'warning', run: 'r1', code: 'X', message: `m${from + i}`, step: from + i, time: from + i }));

/** A log of `count` one-record batches (seq 0 … count − 1) and its spill file in a new directory. */
function setup(count: number) {
  const log = new BatchLog({ run: 'r1', maxBatchRecords: 1 });
  log.cut(warnings(0, count));
  const frames = new Map([...log.values()].map((b) => [b.seq, b.text ?? '']));
  const dir = freshDir();
  const spill = new SpillFile(join(dir, 'spill.jsonl'), dir, log);
  return { log, spill, frames, dir };
}

const lines = (path: string) => readFileSync(path, 'utf8').split('\n');
const seqsIn = (path: string) =>
  lines(path)
    .filter((l) => l !== '')
    .map((l) => (decodeRecord(l) as unknown as BatchMessage).seq);

describe('SpillFile', () => {
  it('names the file after the run and the process, the run id made safe for a file name', () => {
    expect(spillFilePath('/tmp/x', 'run-1.a_b')).toBe(join('/tmp/x', `tidemark-spill-run-1.a_b-${process.pid}.jsonl`));
    expect(basename(spillFilePath('/tmp/x', 'a/b c:ü'))).toBe(`tidemark-spill-a_b_c__-${process.pid}.jsonl`);
    expect(basename(spillFilePath('/tmp/x', 'r'.repeat(300)))).toBe(`tidemark-spill-${'r'.repeat(100)}-${process.pid}.jsonl`);
  });

  it('moves the oldest batches out of memory, one frame per line exactly as sent, and reads them back', async () => {
    const { log, spill, frames, dir } = setup(5);
    const b3 = log.get(3)!;
    const b4 = log.get(4)!;
    expect(existsSync(dir)).toBe(false);
    await spill.spillOver(b3.bytes + b4.bytes);
    expect(spill.isOpen).toBe(true);
    expect(lines(spill.path)).toEqual([frames.get(0), frames.get(1), frames.get(2), '']);
    expect(log.memBytes).toBe(b3.bytes + b4.bytes);
    expect(log.spilled).toBe(3);
    expect([...log.values()].map((b) => b.text === null)).toEqual([true, true, true, false, false]);
    expect([...log.values()].every((b) => !b.spilling)).toBe(true);
    const failures: unknown[] = [];
    for (const seq of [0, 1, 2, 3]) expect(await spill.read(log.get(seq)!, (e) => failures.push(e))).toBe(frames.get(seq));
    expect(failures).toEqual([]);
    // Under the bound: nothing more to move.
    await spill.spillOver(log.memBytes);
    expect(lines(spill.path)).toHaveLength(4);
    // Past it again: appended after what is there.
    await spill.spillOver(0);
    expect(seqsIn(spill.path)).toEqual([0, 1, 2, 3, 4]);
    expect(log.memBytes).toBe(0);
    expect(await spill.read(log.get(4)!, (e) => failures.push(e))).toBe(frames.get(4));
  });

  it('stays while any kept batch lives in it, and is deleted once none does', async () => {
    const { log, spill, frames } = setup(3);
    await spill.spillOver(log.get(2)!.bytes);
    expect(log.spilled).toBe(2);
    log.remove(log.get(0)!);
    await spill.removeIfUnused();
    expect(existsSync(spill.path)).toBe(true);
    log.remove(log.get(1)!);
    await spill.removeIfUnused();
    expect(existsSync(spill.path)).toBe(false);
    expect(spill.isOpen).toBe(false);
    // Spilling again starts a new file from its first byte.
    await spill.spillOver(0);
    expect(seqsIn(spill.path)).toEqual([2]);
    expect(await spill.read(log.get(2)!, () => {})).toBe(frames.get(2));
  });

  it('writes no line for a batch acknowledged before its queued write ran', async () => {
    const { log, spill, frames } = setup(3);
    const pending = spill.spillOver(0);
    log.remove(log.get(1)!);
    await pending;
    expect(lines(spill.path)).toEqual([frames.get(0), frames.get(2), '']);
    expect(log.spilled).toBe(2);
    expect(log.memBytes).toBe(0);
  });

  it('reads nothing for a batch no longer kept; reports a batch it cannot read back', async () => {
    const { log, spill } = setup(2);
    await spill.spillOver(0);
    const b0 = log.get(0)!;
    const b1 = log.get(1)!;
    log.remove(b0);
    const failures: unknown[] = [];
    expect(await spill.read(b0, (e) => failures.push(e))).toBeNull();
    expect(failures).toEqual([]);
    // Pointing past the end of the file: a short read.
    b1.spill = { offset: 1_000_000, length: 10 };
    expect(await spill.read(b1, (e) => failures.push(e))).toBeNull();
    expect(failures.map((e) => (e as Error).message)).toEqual(['read 0 of 10 bytes at offset 1000000']);
    expect(spill.lastError).toBe(failures[0]);
  });

  it('keeps the batches in memory when the file cannot be written', async () => {
    const { log } = setup(2);
    // The directory is a file, so it cannot be created.
    const notDir = join(root, `file${n++}`);
    writeFileSync(notDir, '');
    const spill = new SpillFile(join(notDir, 'spill.jsonl'), notDir, log);
    const mem = log.memBytes;
    await expect(spill.spillOver(0)).rejects.toMatchObject({ code: 'EEXIST' });
    expect(log.memBytes).toBe(mem);
    expect(log.spilled).toBe(0);
    expect([...log.values()].map((b: Batch) => [b.text !== null, b.spilling])).toEqual([
      [true, false],
      [true, false],
    ]);
    expect(spill.lastError).toMatchObject({ code: 'EEXIST' });
    expect(spill.isOpen).toBe(false);
  });

  it('at close, rewrites the file to hold exactly the unsent batches in seq order, spilled or not', async () => {
    const { log, spill, frames } = setup(6);
    await spill.spillOver(log.get(4)!.bytes + log.get(5)!.bytes);
    // Batch 1 was acknowledged (its line is dead weight in the file), batch 4 too.
    log.remove(log.get(1)!);
    log.remove(log.get(4)!);
    expect(await spill.keepUnsent()).toBe(spill.path);
    expect(lines(spill.path)).toEqual([frames.get(0), frames.get(2), frames.get(3), frames.get(5), '']);
    expect(existsSync(`${spill.path}.tmp`)).toBe(false);
    expect(spill.isOpen).toBe(false);
  });

  it('at close, keeps batches that were never spilled in a new file', async () => {
    const { log, spill, frames, dir } = setup(2);
    expect(existsSync(dir)).toBe(false);
    expect(await spill.keepUnsent()).toBe(spill.path);
    expect(lines(spill.path)).toEqual([frames.get(0), frames.get(1), '']);
    expect(log.size).toBe(2);
  });
});
