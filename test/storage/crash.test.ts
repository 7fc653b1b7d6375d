/**
 * kill -9 of a training process at random moments, on both backends: the store opens (a SQLite file
 * passes SQLite's own integrity check), holds each window wholly or not at all, and shows the run as
 * interrupted. PostgreSQL needs its server binaries (test/helpers/postgres.ts): required in CI.
 */
import { spawn } from 'node:child_process';
import { mkdtempSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import Database from 'better-sqlite3';
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import { connectStore } from '../../src/storage/connect-store.js';
import { mulberry32 } from '../helpers/random.js';
import { postgresMissing, startPostgres, type PgCluster } from '../helpers/postgres.js';

const dir = mkdtempSync(join(tmpdir(), 'tidemark-crash-'));
afterAll(() => rmSync(dir, { recursive: true, force: true }));

const KILLS = 20;

/** Starts a training child, waits for its first stored windows, then kills it after `delayMs`. */
function trainAndKill(db: string, seed: number, delayMs: number): Promise<number> {
  return new Promise((resolve, reject) => {
    const child = spawn(process.execPath, ['--import', 'tsx', 'test/storage/training.child.ts', db, String(seed)], {
      stdio: ['ignore', 'pipe', 'pipe'],
    });
    let windows = 0;
    let armed = false;
    let stderr = '';
    child.stderr.on('data', (d: Buffer) => (stderr += d.toString()));
    child.stdout.on('data', (d: Buffer) => {
      windows += d.toString().split('\n').filter((l) => l === 'window').length;
      if (!armed && windows > 0) {
        armed = true;
        setTimeout(() => child.kill('SIGKILL'), delayMs);
      }
    });
    const guard = setTimeout(() => child.kill('SIGKILL'), 30_000);
    child.on('exit', (code, signal) => {
      clearTimeout(guard);
      if (signal === 'SIGKILL' && armed) resolve(windows);
      else reject(new Error(`child ended with ${code ?? signal} before it was killed: ${stderr.slice(-2000)}`));
    });
  });
}

let cluster: PgCluster | null = null;
beforeAll(async () => {
  if (postgresMissing === null) cluster = await startPostgres();
}, 60_000);
afterAll(() => cluster?.stop());

const BACKENDS = [
  { name: 'sqlite', skip: null as string | null, address: () => join(dir, 'crash.db') },
  { name: 'postgres', skip: postgresMissing, address: () => `${cluster!.urlOf('postgres')}?schema=crash` },
];

for (const backend of BACKENDS) {
  describe.skipIf(backend.skip !== null)(`${backend.name} store after kill -9${backend.skip === null ? '' : ` (skipped: ${backend.skip})`}`, () => {
    it(`stays consistent over ${KILLS} killed training processes`, { timeout: 240_000 }, async () => {
      const db = backend.address();
      const rng = mulberry32(2026);
      const seen: number[] = [];
      // Two at a time: both write into the same store, as concurrent runs would.
      for (let i = 0; i < KILLS; i += 2) {
        const pair = [i, i + 1].map((seed) => trainAndKill(db, seed, Math.floor(rng() * 400)));
        seen.push(...(await Promise.all(pair)));
      }
      expect(seen.every((n) => n >= 1)).toBe(true);

      if (backend.name === 'sqlite') {
        const raw = new Database(db, { readonly: true });
        expect(raw.pragma('integrity_check', { simple: true })).toBe('ok');
        raw.close();
      }

      // Every writer is dead, so any heartbeat is stale.
      const store = await connectStore(db, { staleAfterMs: 1 });
      try {
        const runs = await store.runs();
        expect(runs.length).toBe(KILLS);
        for (const run of runs) {
          expect(run.status).toBe('interrupted');
          const windows = await store.windows(run.id);
          expect(windows.length).toBe(run.windows);
          expect(windows.length).toBeGreaterThanOrEqual(1);
          windows.forEach((w, i) => {
            // Wholly present: every layer with every statistic, and the network entry.
            expect(w.index).toBe(i);
            expect(Object.keys(w.layers).length).toBe(3);
            for (const s of [...Object.values(w.layers), w.network]) {
              expect(Number.isFinite(s.grad_snr)).toBe(true);
              expect(Number.isFinite(s.weight_travel)).toBe(true);
              expect(s.batches).toBe(4);
            }
          });
        }
      } finally {
        await store.close();
      }
    });
  });
}
