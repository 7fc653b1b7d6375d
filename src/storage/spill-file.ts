/**
 * The spill file of a remote writer: JSON Lines, one `batch` message per line exactly as sent, holding the
 * batches of a {@link BatchLog} that did not fit in memory. Batches are read back from it to be resent; it
 * is deleted once no kept batch lives in it, and at close it is rewritten to hold exactly the unsent ones
 * (`tidemark resend` and `tidemark import` read it then).
 */
import { mkdir, open, rename, unlink, type FileHandle } from 'node:fs/promises';
import { join } from 'node:path';
import { BATCH_TARGET_BYTES, type Batch, type BatchLog } from './batch-log.js';

/** `tidemark-spill-<run id>-<pid>.jsonl` in `dir` (docs/protocol.md), the run id made safe for a file name. */
export function spillFilePath(dir: string, runId: string): string {
  return join(dir, `tidemark-spill-${runId.replace(/[^A-Za-z0-9._-]/g, '_').slice(0, 100)}-${process.pid}.jsonl`);
}

export class SpillFile {
  private handle: FileHandle | null = null;
  private end = 0;
  /** The last failure, named when close() could not keep the unsent batches. */
  lastError: unknown = null;
  /** Spill file work runs one step at a time: a read never overtakes the write it depends on. */
  private chain: Promise<void> = Promise.resolve();

  /** Nothing is created until a batch is spilled; `dir` is created then if missing. */
  constructor(
    readonly path: string,
    private readonly dir: string,
    private readonly log: BatchLog,
  ) {}

  /** Whether the file is open (batches were spilled and it has not been removed since). */
  get isOpen(): boolean {
    return this.handle !== null;
  }

  private onFile<T>(step: () => Promise<T>): Promise<T> {
    const next = this.chain.then(step);
    this.chain = next.then(
      () => {},
      () => {},
    );
    return next;
  }

  /**
   * Moves the oldest in-memory batches of the log to the file until it holds at most `maxMemoryBytes`.
   * Rejects when the file cannot be written: the batches then stay in memory, nothing lost.
   */
  async spillOver(maxMemoryBytes: number): Promise<void> {
    const chosen = this.log.chooseToSpill(maxMemoryBytes);
    if (chosen.length === 0) return;
    try {
      await this.onFile(async () => {
        const live = chosen.filter((b) => this.log.holds(b) && b.text !== null);
        if (live.length === 0) return;
        if (this.handle === null) {
          await mkdir(this.dir, { recursive: true });
          // Read and write: batches are read back from here to be resent.
          this.handle = await open(this.path, 'w+');
          this.end = 0;
        }
        const buf = Buffer.from(live.map((b) => b.text).join('\n') + '\n');
        await this.handle.write(buf, 0, buf.length, this.end);
        let offset = this.end;
        this.end += buf.length;
        for (const b of live) {
          const length = b.bytes;
          // Acknowledged while the write ran: its line is dead weight until the file is removed.
          this.log.movedToFile(b, { offset, length });
          offset += length + 1;
        }
      });
    } catch (e) {
      this.lastError = e;
      throw e;
    } finally {
      for (const b of chosen) b.spilling = false;
    }
  }

  /**
   * The frame of a kept batch: from memory, or read back from the file. Null when the log no longer holds
   * it, or when it cannot be read; then `onFailure` runs (before any later file step) and the log should
   * give the batch up.
   */
  read(batch: Batch, onFailure: (error: unknown) => void): Promise<string | null> {
    return this.onFile(async () => {
      if (!this.log.holds(batch)) return null;
      if (batch.text !== null) return batch.text;
      const where = batch.spill;
      const handle = this.handle;
      try {
        if (where === null || handle === null) throw new Error('the batch is not in the spill file');
        const buf = Buffer.alloc(where.length);
        const { bytesRead } = await handle.read(buf, 0, where.length, where.offset);
        if (bytesRead !== where.length) throw new Error(`read ${bytesRead} of ${where.length} bytes at offset ${where.offset}`);
        return buf.toString('utf8');
      } catch (e) {
        this.lastError = e;
        onFailure(e);
        return null;
      }
    });
  }

  /** Deletes the file once no batch of the log lives in it; queued after the file work already asked for. */
  removeIfUnused(): Promise<void> {
    return this.onFile(async () => {
      if (this.log.spilled > 0 || this.handle === null) return;
      const handle = this.handle;
      this.handle = null;
      this.end = 0;
      await handle.close().catch(() => {});
      await unlink(this.path).catch(() => {});
    });
  }

  /**
   * At close: rewrites the file to hold exactly the log's batches, in seq order. Returns its path, or null
   * when that failed (`lastError` says why).
   */
  async keepUnsent(): Promise<string | null> {
    const path = this.path;
    try {
      return await this.onFile(async () => {
        await mkdir(this.dir, { recursive: true });
        const tmp = `${path}.tmp`;
        const out = await open(tmp, 'w');
        try {
          let chunk: string[] = [];
          let chunkBytes = 0;
          for (const b of this.log.values()) {
            let text = b.text;
            if (text === null) {
              if (b.spill === null || this.handle === null) continue;
              const buf = Buffer.alloc(b.spill.length);
              await this.handle.read(buf, 0, b.spill.length, b.spill.offset);
              text = buf.toString('utf8');
            }
            chunk.push(text);
            chunkBytes += b.bytes;
            if (chunkBytes >= BATCH_TARGET_BYTES) {
              await out.write(chunk.join('\n') + '\n');
              chunk = [];
              chunkBytes = 0;
            }
          }
          if (chunk.length > 0) await out.write(chunk.join('\n') + '\n');
        } finally {
          await out.close();
        }
        if (this.handle !== null) {
          await this.handle.close().catch(() => {});
          this.handle = null;
        }
        await rename(tmp, path);
        return path;
      });
    } catch (e) {
      this.lastError = e;
      return null;
    }
  }
}
