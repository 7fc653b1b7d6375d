/**
 * A remote writer's numbered batches, from the records queued to the acknowledgement. `cut` turns records
 * into `batch` frames (docs/protocol.md) numbered from 0 and within the frame and record limits; each batch
 * is kept, in seq order, until it is acknowledged or given up. The log counts the bytes of the frames it
 * holds in memory; a batch moved to the spill file keeps its place and seq but no longer counts.
 */
import { describeCause, type ErrorCode } from '../errors.js';
import { MAX_FRAME_BYTES } from '../protocol/messages.js';
import type { SinkRecord } from '../protocol/records.js';
import { encodeRecord } from './sink.js';

/** A batch is cut at this many encoded bytes (one larger record still travels alone, up to a frame). */
export const BATCH_TARGET_BYTES = 1024 * 1024;

export interface Batch {
  seq: number;
  /** Records in the batch (what `dropped` counts if it is given up). */
  records: number;
  /** UTF-8 bytes of `text`. */
  bytes: number;
  /** The frame, while it is held in memory; null once it lives in the spill file only. */
  text: string | null;
  /** Where the frame is in the spill file, once written there. */
  spill: { offset: number; length: number } | null;
  /** A spill write of this batch is queued. */
  spilling: boolean;
  /** Sent at least once: from then on its seq and content are fixed. */
  sent: boolean;
}

export interface BatchLogOptions {
  /** The run every batch belongs to. */
  run: string;
  /** Records per batch at most. */
  maxBatchRecords: number;
  /** Told of each record that cannot be sent (it is left out of every batch). */
  onDropped?: (code: ErrorCode, message: string, cause?: unknown) => void;
}

export class BatchLog {
  private readonly framePrefix: string;
  private readonly maxBatchRecords: number;
  private readonly onDropped: (code: ErrorCode, message: string, cause?: unknown) => void;
  /** Unacknowledged batches by seq; inserted in seq order, so iteration is oldest first. */
  private readonly batches = new Map<number, Batch>();
  private seqNext = 0;
  /** Every seq below this is acknowledged or given up. */
  private seqLow = 0;
  private mem = 0;
  private inFile = 0;

  constructor(options: BatchLogOptions) {
    this.framePrefix = `{"v":1,"type":"batch","run":${JSON.stringify(options.run)},"seq":`;
    this.maxBatchRecords = options.maxBatchRecords;
    this.onDropped = options.onDropped ?? (() => {});
  }

  /** The seq the next new batch gets. */
  get nextSeq(): number {
    return this.seqNext;
  }

  /** The oldest seq not yet acknowledged or given up (`nextSeq` when none is left). */
  get lowSeq(): number {
    return this.seqLow;
  }

  /** Bytes of the frames held in memory (spilled ones excluded). */
  get memBytes(): number {
    return this.mem;
  }

  /** Batches whose frame lives in the spill file only. */
  get spilled(): number {
    return this.inFile;
  }

  get size(): number {
    return this.batches.size;
  }

  /** Records in all batches kept. */
  get records(): number {
    let n = 0;
    for (const b of this.batches.values()) n += b.records;
    return n;
  }

  /** Oldest first. */
  values(): IterableIterator<Batch> {
    return this.batches.values();
  }

  get(seq: number): Batch | undefined {
    return this.batches.get(seq);
  }

  /** Whether this very batch is still kept (not acknowledged, given up or cleared meanwhile). */
  holds(batch: Batch): boolean {
    return this.batches.get(batch.seq) === batch;
  }

  /** The oldest batch kept at `seq` or later. */
  firstFrom(seq: number): Batch | undefined {
    for (let s = Math.max(seq, this.seqLow); s < this.seqNext; s++) {
      const b = this.batches.get(s);
      if (b !== undefined) return b;
    }
    return undefined;
  }

  /** Cuts records into new batches (or grows the last one while it was never sent). */
  cut(records: readonly SinkRecord[]): void {
    // A record alone must fit a frame with the envelope around it.
    const limit = MAX_FRAME_BYTES - Buffer.byteLength(this.framePrefix) - 40;
    let parts: string[] = [];
    let partBytes = 0;
    for (const record of records) {
      let text: string;
      try {
        text = encodeRecord(record);
      } catch (e) {
        // A circular or BigInt value in a record (e.g. in a user's config) cannot be sent.
        this.onDropped('TIDEMARK_ERR_RECORD_INVALID', `A ${String(record?.type)} record could not be encoded as JSON and was dropped: ${describeCause(e)}`, e);
        continue;
      }
      const bytes = Buffer.byteLength(text);
      if (bytes > limit) {
        this.onDropped('TIDEMARK_ERR_PAYLOAD_TOO_LARGE', `A ${record.type} record of ${bytes} bytes is larger than a protocol frame (${MAX_FRAME_BYTES} bytes) and was dropped.`);
        continue;
      }
      if (parts.length > 0 && (parts.length >= this.maxBatchRecords || partBytes + bytes + 1 > BATCH_TARGET_BYTES)) {
        this.add(parts);
        parts = [];
        partBytes = 0;
      }
      parts.push(text);
      partBytes += bytes + 1;
    }
    if (parts.length > 0) this.add(parts);
  }

  private add(parts: string[]): void {
    // While the link is down or behind, windows pile up one small batch each; a batch never sent may
    // still grow, so a backlog drains in full batches instead of one frame (and one ack) per window.
    const last = this.batches.get(this.seqNext - 1);
    if (last !== undefined && !last.sent && last.text !== null && last.spill === null && !last.spilling && last.seq > 0 && last.records + parts.length <= this.maxBatchRecords) {
      const text = `${last.text.slice(0, -2)},${parts.join(',')}]}`;
      const bytes = Buffer.byteLength(text);
      if (bytes <= BATCH_TARGET_BYTES) {
        this.mem += bytes - last.bytes;
        last.text = text;
        last.bytes = bytes;
        last.records += parts.length;
        return;
      }
    }
    const seq = this.seqNext++;
    const text = `${this.framePrefix}${seq},"records":[${parts.join(',')}]}`;
    const bytes = Buffer.byteLength(text);
    this.batches.set(seq, { seq, records: parts.length, bytes, text, spill: null, spilling: false, sent: false });
    this.mem += bytes;
  }

  /** Forgets an acknowledged or given-up batch. */
  remove(batch: Batch): void {
    this.batches.delete(batch.seq);
    if (batch.text !== null) this.mem -= batch.bytes;
    if (batch.spill !== null) this.inFile--;
    while (this.seqLow < this.seqNext && !this.batches.has(this.seqLow)) this.seqLow++;
  }

  /**
   * The oldest batches still in memory whose frames, moved out, bring memory down to `maxBytes`; each is
   * marked `spilling` until the caller is done with it.
   */
  chooseToSpill(maxBytes: number): Batch[] {
    const chosen: Batch[] = [];
    if (this.mem <= maxBytes) return chosen;
    let left = this.mem;
    for (const b of this.batches.values()) {
      if (left <= maxBytes) break;
      if (b.text === null || b.spilling) continue;
      b.spilling = true;
      chosen.push(b);
      left -= b.bytes;
    }
    return chosen;
  }

  /** The batch's frame now lives at `where` in the spill file only. */
  movedToFile(batch: Batch, where: { offset: number; length: number }): void {
    if (!this.holds(batch) || batch.text === null) return;
    batch.spill = where;
    batch.text = null;
    this.mem -= batch.bytes;
    this.inFile++;
  }

  /** Forgets every batch (at close, once the unsent ones are counted and kept elsewhere). Seqs are not reused. */
  clear(): void {
    this.batches.clear();
    this.mem = 0;
    this.inFile = 0;
  }
}
