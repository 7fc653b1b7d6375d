/**
 * The batch log alone: numbering, the frame and record limits, growing a never-sent batch, acknowledging
 * out of order, and the memory it counts as batches move to the spill file and go.
 */
import { describe, expect, it } from 'vitest';
import type { ErrorCode } from '../../src/errors.js';
import { MAX_FRAME_BYTES, type BatchMessage } from '../../src/protocol/messages.js';
import type { SinkRecord } from '../../src/protocol/records.js';
import { BATCH_TARGET_BYTES, BatchLog, type Batch } from '../../src/storage/batch-log.js';
import { decodeRecord } from '../../src/storage/sink.js';

const warning = (i: number, message = `m${i}`): SinkRecord => ({ type: 'warning', run: 'r1', code: 'X', message, step: i, time: i });
const warnings = (from: number, n: number): SinkRecord[] => Array.from({ length: n }, (_, i) => warning(from + i));

function frame(b: Batch): BatchMessage {
  expect(b.text).not.toBeNull();
  return decodeRecord(b.text ?? '') as unknown as BatchMessage;
}

function logOf(maxBatchRecords: number) {
  const drops: { code: ErrorCode; message: string }[] = [];
  const log = new BatchLog({ run: 'r1', maxBatchRecords, onDropped: (code, message) => drops.push({ code, message }) });
  return { log, drops };
}

const memOf = (log: BatchLog) => [...log.values()].reduce((n, b) => n + (b.text === null ? 0 : b.bytes), 0);

describe('BatchLog', () => {
  it('numbers batches from 0 in seq order, at most maxBatchRecords each, as batch frames of the run', () => {
    const { log, drops } = logOf(5);
    const written = warnings(0, 12);
    log.cut(written);
    const batches = [...log.values()];
    expect(batches.map((b) => b.seq)).toEqual([0, 1, 2]);
    expect(batches.map((b) => b.records)).toEqual([5, 5, 2]);
    const frames = batches.map(frame);
    expect(frames.map((f) => [f.v, f.type, f.run, f.seq])).toEqual([
      [1, 'batch', 'r1', 0],
      [1, 'batch', 'r1', 1],
      [1, 'batch', 'r1', 2],
    ]);
    expect(frames.flatMap((f) => f.records)).toEqual(written);
    for (const b of batches) expect(b.bytes).toBe(Buffer.byteLength(b.text ?? ''));
    expect(log.nextSeq).toBe(3);
    expect(log.lowSeq).toBe(0);
    expect(log.records).toBe(12);
    expect(log.size).toBe(3);
    expect(drops).toEqual([]);
  });

  it('cuts below 1 MiB, never past a frame, and drops a record too large for one or not encodable', () => {
    const { log, drops } = logOf(500);
    const big = (i: number) => warning(i, 'x'.repeat(300_000));
    const cyclic: Record<string, unknown> = {};
    cyclic.self = cyclic;
    log.cut([big(0), big(1), big(2), warning(9, 'y'.repeat(MAX_FRAME_BYTES)), big(3), { type: 'warning', run: 'r1', code: 'X', message: cyclic } as unknown as SinkRecord, big(4)]);
    const batches = [...log.values()];
    // Three 300 kB records fit under 1 MiB, a fourth would not.
    expect(batches.map((b) => b.records)).toEqual([3, 2]);
    for (const b of batches) {
      expect(b.bytes).toBeLessThanOrEqual(BATCH_TARGET_BYTES);
      expect(b.bytes).toBeLessThanOrEqual(MAX_FRAME_BYTES);
    }
    expect(batches.flatMap((b) => frame(b).records.map((r) => (r as { step: number }).step))).toEqual([0, 1, 2, 3, 4]);
    expect(drops.map((d) => d.code)).toEqual(['TIDEMARK_ERR_PAYLOAD_TOO_LARGE', 'TIDEMARK_ERR_RECORD_INVALID']);
    expect(drops[0]?.message).toContain(`larger than a protocol frame (${MAX_FRAME_BYTES} bytes)`);
    expect(log.records).toBe(5);
  });

  it('a record just under the frame limit travels alone, in a frame within MAX_FRAME_BYTES', () => {
    const { log, drops } = logOf(500);
    const prefix = Buffer.byteLength('{"v":1,"type":"batch","run":"r1","seq":');
    const empty = Buffer.byteLength(JSON.stringify(warning(1, '')));
    // The largest record the log accepts: MAX_FRAME_BYTES − prefix − 40 encoded bytes.
    const largest = warning(1, 'z'.repeat(MAX_FRAME_BYTES - prefix - 40 - empty));
    log.cut([warning(0), largest, warning(2)]);
    expect(drops).toEqual([]);
    const batches = [...log.values()];
    expect(batches.map((b) => b.records)).toEqual([1, 1, 1]);
    expect(batches[1]!.bytes).toBeGreaterThan(BATCH_TARGET_BYTES);
    expect(batches[1]!.bytes).toBeLessThanOrEqual(MAX_FRAME_BYTES);
  });

  it('grows the last batch while it was never sent, but not batch 0 and not a sent one', () => {
    const { log } = logOf(4);
    log.cut([warning(0)]);
    log.cut([warning(1)]);
    log.cut([warning(2)]);
    log.cut(warnings(3, 3));
    // Batch 0 stays alone (it carries the run); batch 1 grew to 2 records, then 3 more would pass 4.
    expect([...log.values()].map((b) => [b.seq, b.records])).toEqual([
      [0, 1],
      [1, 2],
      [2, 3],
    ]);
    expect(frame(log.get(1)!).records).toEqual(warnings(1, 2));
    expect(log.memBytes).toBe(memOf(log));
    log.get(2)!.sent = true;
    log.cut([warning(6)]);
    expect([...log.values()].map((b) => b.records)).toEqual([1, 2, 3, 1]);
    expect(frame(log.get(2)!).records).toEqual(warnings(3, 3));
    expect(frame(log.get(3)!).records).toEqual([warning(6)]);
    expect(log.memBytes).toBe(memOf(log));
  });

  it('acknowledging removes a batch; lowSeq moves past the oldest kept seq only', () => {
    const { log } = logOf(1);
    log.cut(warnings(0, 4));
    const total = log.memBytes;
    expect(total).toBe(memOf(log));
    const b2 = log.get(2)!;
    log.remove(b2);
    expect(log.lowSeq).toBe(0);
    expect(log.get(2)).toBeUndefined();
    expect(log.holds(b2)).toBe(false);
    expect(log.memBytes).toBe(total - b2.bytes);
    expect(log.firstFrom(2)?.seq).toBe(3);
    log.remove(log.get(0)!);
    expect(log.lowSeq).toBe(1);
    expect(log.firstFrom(0)?.seq).toBe(1);
    log.remove(log.get(1)!);
    expect(log.lowSeq).toBe(3);
    log.remove(log.get(3)!);
    expect(log.lowSeq).toBe(4);
    expect(log.size).toBe(0);
    expect(log.memBytes).toBe(0);
    expect(log.firstFrom(0)).toBeUndefined();
    // Seqs are never reused.
    log.cut([warning(9)]);
    expect(log.get(4)?.records).toBe(1);
  });

  it('chooses the oldest batches to spill down to the bound, and counts memory as they move out and go', () => {
    const { log } = logOf(1);
    log.cut(warnings(0, 5));
    const sizes = [...log.values()].map((b) => b.bytes);
    const total = sizes.reduce((a, b) => a + b, 0);
    expect(log.chooseToSpill(total)).toEqual([]);
    // Just over what the newest three take: the oldest two go.
    const bound = sizes[2]! + sizes[3]! + sizes[4]!;
    const chosen = log.chooseToSpill(bound);
    expect(chosen.map((b) => b.seq)).toEqual([0, 1]);
    expect(chosen.every((b) => b.spilling)).toBe(true);
    // Batches already on their way out are not chosen twice; until they are out, memory still counts them.
    const again = log.chooseToSpill(bound);
    expect(again.map((b) => b.seq)).toEqual([2, 3]);
    for (const b of again) b.spilling = false;
    log.movedToFile(chosen[0]!, { offset: 0, length: chosen[0]!.bytes });
    log.movedToFile(chosen[1]!, { offset: chosen[0]!.bytes + 1, length: chosen[1]!.bytes });
    expect(log.memBytes).toBe(bound);
    expect(log.spilled).toBe(2);
    expect(chosen[0]!.text).toBeNull();
    expect(chosen[1]!.spill).toEqual({ offset: sizes[0]! + 1, length: sizes[1]! });
    // A spilled batch going frees no memory; one in memory does.
    log.remove(chosen[0]!);
    expect(log.spilled).toBe(1);
    expect(log.memBytes).toBe(bound);
    log.remove(log.get(4)!);
    expect(log.memBytes).toBe(sizes[2]! + sizes[3]!);
    expect(log.records).toBe(3);
  });

  it('does not move a batch acknowledged before its spill write finished', () => {
    const { log } = logOf(1);
    log.cut(warnings(0, 2));
    const [b0] = log.chooseToSpill(0);
    log.remove(b0!);
    const mem = log.memBytes;
    log.movedToFile(b0!, { offset: 0, length: b0!.bytes });
    expect(log.spilled).toBe(0);
    expect(log.memBytes).toBe(mem);
  });

  it('clear forgets every batch and its memory but keeps numbering', () => {
    const { log } = logOf(2);
    log.cut(warnings(0, 5));
    log.clear();
    expect(log.size).toBe(0);
    expect(log.records).toBe(0);
    expect(log.memBytes).toBe(0);
    expect(log.spilled).toBe(0);
    log.cut([warning(7)]);
    expect([...log.values()].map((b) => b.seq)).toEqual([3]);
  });
});
