/**
 * The way back for a run whose server was down for the whole run: the writer's spill file, named in its
 * message with the commands that read it, goes into a local store (`tidemark import`) or to the server once
 * it is up (`tidemark resend`), whole, and a second time without doubling anything.
 */
import { mkdtempSync, rmSync } from 'node:fs';
import { createServer } from 'node:net';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import type { WindowRecord } from '../../src/protocol/records.js';
import { startServer } from '../../src/server/serve.js';
import { importJsonl } from '../../src/storage/export.js';
import { summarizeJsonl } from '../../src/storage/jsonl-reader.js';
import { RemoteSink } from '../../src/storage/remote-sink.js';
import { resendSpill } from '../../src/storage/resend.js';
import { openStore } from '../../src/storage/sqlite-store.js';
import { builtCli } from '../helpers/cli.js';
import { fakeRun, fakeWindows } from '../helpers/window-records.js';

const dir = mkdtempSync(join(tmpdir(), 'tidemark-resend-'));
afterAll(() => rmSync(dir, { recursive: true, force: true }));

/** A loopback port nothing listens on (taken, then given back). */
async function deadPort(): Promise<number> {
  const srv = createServer();
  await new Promise<void>((resolve) => srv.listen(0, '127.0.0.1', resolve));
  const port = (srv.address() as { port: number }).port;
  await new Promise<void>((resolve) => srv.close(() => resolve()));
  return port;
}

const run = fakeRun({ id: 'spilled-run-0001', started_at: 1_700_000_000_000 });
const windows: WindowRecord[] = fakeWindows(run, 30, 3);
let spill = '';
let messages: string[] = [];
let port = 0;

beforeAll(async () => {
  port = await deadPort();
  messages = [];
  const sink = new RemoteSink({
    url: `http://127.0.0.1:${port}`,
    spillDir: dir,
    closeTimeoutMs: 300,
    maxBatchRecords: 7,
    onError: (e) => void messages.push((e as Error).message),
  });
  await sink.open(run);
  for (const window of windows) sink.write({ type: 'window', window });
  sink.write({ type: 'end', run: run.id, status: 'finished', step: windows.at(-1)!.step, time: windows.at(-1)!.time + 1 });
  await sink.close();
  spill = sink.spillPath!;
});

describe('a run whose server was down the whole time', () => {
  it('ends with a message naming the spill file and both ways back', () => {
    const unsent = messages.find((m) => m.includes('were not acknowledged'));
    expect(unsent).toBeDefined();
    expect(unsent).toContain(`tidemark resend ${spill} --to ws://127.0.0.1:${port}/ingest`);
    expect(unsent).toContain(`tidemark import ${spill}`);
  });

  it('summarises the spill file as one run', async () => {
    const [summary] = await summarizeJsonl(spill);
    expect(summary).toMatchObject({ run: { id: run.id }, windows: 30, status: 'finished' });
  });

  it('imports the spill file into a local store whole, and a second time adds nothing', async () => {
    const store = openStore(join(dir, 'local.db'));
    try {
      expect(await importJsonl(store, spill)).toEqual({ runs: [run.id], windows: { [run.id]: { inFile: 30, added: 30 } }, unended: [], tornLastLine: false });
      expect(store.windows(run.id)).toEqual(windows);
      expect(store.resolveRun(run.id)).toMatchObject({ status: 'finished', windows: 30 });
      expect((await importJsonl(store, spill)).windows[run.id]).toEqual({ inFile: 30, added: 0 });
    } finally {
      store.close();
    }
  });

  it('resends the spill file to the server once it is up, and again without doubling', async () => {
    const store = openStore(join(dir, 'server.db'));
    const server = await startServer({ store, port: 0 });
    try {
      const first = await resendSpill(spill, server.url);
      expect(first).toMatchObject({ runs: [run.id], duplicates: 0, records: 32 });
      // The run record goes alone as batch 0; the 31 other records in batches of at most 7.
      expect(first.batches).toBe(1 + Math.ceil(31 / 7));
      expect(store.windows(run.id)).toEqual(windows);
      expect(store.resolveRun(run.id)).toMatchObject({ status: 'finished', windows: 30 });
      const again = await resendSpill(spill, server.url);
      expect(again.duplicates).toBe(first.batches);
      expect(store.resolveRun(run.id).windows).toBe(30);
    } finally {
      await server.close();
      store.close();
    }
  });

  it('says when the server is still down, with what to do', async () => {
    await expect(resendSpill(spill, `http://127.0.0.1:${port}`, { timeoutMs: 2000 })).rejects.toMatchObject({
      code: 'TIDEMARK_ERR_REMOTE_CONNECT',
      message: expect.stringContaining('run the same command again once the server is up') as unknown,
    });
  });

  it('works from the built command line: import prints what was new, resend refuses an export', () => {
    const cli = builtCli;
    const db = join(dir, 'cli.db');
    const first = cli('import', spill, '--db', db);
    expect(first.status).toBe(0);
    expect(first.stdout).toBe(`Imported run ${run.id}: 30 new windows of 30 in the file.\n`);
    const second = cli('import', spill, '--db', db);
    expect(second.stdout).toBe(`Imported run ${run.id}: already in the store, nothing new.\n`);
    const exported = join(dir, 'export.jsonl');
    expect(cli('export', run.id, '--db', db, '--format', 'jsonl', '--out', exported).status).toBe(0);
    const wrong = cli('resend', exported, '--to', `http://127.0.0.1:${port}`);
    expect(wrong.status).toBe(2);
    expect(wrong.stderr).toContain("not a batch message. resend sends a remote writer's spill file; for an export or a JSON Lines store use 'tidemark import'");
  });
});
