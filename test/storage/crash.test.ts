/**
 * kill -9 of a training process at random moments: the store opens, passes SQLite's own integrity
 * check, holds each window wholly or not at all, and shows the run as interrupted.
 */
import { spawn } from 'node:child_process';
import { mkdtempSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import Database from 'better-sqlite3';
import { afterAll, describe, expect, it } from 'vitest';
import { openStore } from '../../src/storage/sqlite-store.js';
import { mulberry32 } from '../helpers/random.js';

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

describe('store after kill -9', () => {
  it(`stays consistent over ${KILLS} killed training processes`, { timeout: 240_000 }, async () => {
    const db = join(dir, 'crash.db');
    const rng = mulberry32(2026);
    const seen: number[] = [];
    // Two at a time: both write into the same file, as concurrent runs would.
    for (let i = 0; i < KILLS; i += 2) {
      const pair = [i, i + 1].map((seed) => trainAndKill(db, seed, Math.floor(rng() * 400)));
      seen.push(...(await Promise.all(pair)));
    }
    expect(seen.every((n) => n >= 1)).toBe(true);

    const raw = new Database(db, { readonly: true });
    expect(raw.pragma('integrity_check', { simple: true })).toBe('ok');
    raw.close();

    // Every writer is dead, so any heartbeat is stale.
    const store = openStore(db, { staleAfterMs: 1 });
    const runs = store.runs();
    expect(runs.length).toBe(KILLS);
    for (const run of runs) {
      expect(run.status).toBe('interrupted');
      const windows = store.windows(run.id);
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
    store.close();
  });
});
