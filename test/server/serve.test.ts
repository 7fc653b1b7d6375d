/**
 * Starting the server: the safe defaults, the listen errors, and the `tidemark serve` command as a user
 * runs it (a child process stopped with SIGTERM).
 */
import { spawn } from 'node:child_process';
import { mkdtempSync, rmSync } from 'node:fs';
import { createServer } from 'node:net';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { afterAll, describe, expect, it } from 'vitest';
import { startServer } from '../../src/server/serve.js';
import { openStore } from '../../src/storage/sqlite-store.js';

const dir = mkdtempSync(join(tmpdir(), 'tidemark-serve-'));
afterAll(() => rmSync(dir, { recursive: true, force: true }));

describe('startServer', () => {
  it('refuses to listen beyond loopback without a token, and says how to fix it', async () => {
    const store = openStore(':memory:');
    await expect(startServer({ store, host: '0.0.0.0', port: 0 })).rejects.toMatchObject({ code: 'TIDEMARK_ERR_SERVE_UNSAFE', message: expect.stringContaining('--token') });
    store.close();
  });

  it('with --insecure listens beyond loopback, after a warning', async () => {
    const store = openStore(':memory:');
    const warnings: string[] = [];
    const s = await startServer({ store, host: '0.0.0.0', port: 0, insecure: true, onWarning: (m) => warnings.push(m) });
    expect(warnings).toEqual([expect.stringContaining('without a token')]);
    expect((await fetch(`http://127.0.0.1:${s.port}/healthz`)).status).toBe(200);
    await s.close();
    store.close();
  });

  it('refuses a short token, and reports a port in use with a coded error', async () => {
    const store = openStore(':memory:');
    await expect(startServer({ store, port: 0, token: 'abc' })).rejects.toMatchObject({ code: 'TIDEMARK_ERR_OPTION_INVALID' });
    const blocker = createServer();
    await new Promise<void>((resolve) => blocker.listen(0, '127.0.0.1', resolve));
    const port = (blocker.address() as { port: number }).port;
    await expect(startServer({ store, port })).rejects.toMatchObject({ code: 'TIDEMARK_ERR_SERVE_LISTEN', message: expect.stringContaining(String(port)) });
    blocker.close();
    store.close();
  });
});

describe('tidemark serve', () => {
  it('prints its URL, answers on it, and stops cleanly on SIGTERM', async () => {
    const db = join(dir, 'serve.db');
    const child = spawn(process.execPath, ['--import', 'tsx', 'src/cli/bin.ts', 'serve', '--db', db, '--port', '0'], { stdio: ['ignore', 'pipe', 'pipe'] });
    let out = '';
    let err = '';
    child.stderr.on('data', (d: Buffer) => (err += String(d)));
    const url = await new Promise<string>((resolve, reject) => {
      const t = setTimeout(() => reject(new Error(`no URL printed: ${out} ${err}`)), 20_000);
      child.stdout.on('data', (d: Buffer) => {
        out += String(d);
        const m = /at (http:\/\/127\.0\.0\.1:\d+)/.exec(out);
        if (m) {
          clearTimeout(t);
          resolve(m[1]!);
        }
      });
    });
    expect(await (await fetch(`${url}/healthz`)).json()).toEqual({ status: 'ok' });
    expect(await (await fetch(`${url}/api/runs`)).json()).toEqual([]);
    const exited = new Promise<number | null>((resolve) => child.on('exit', (code) => resolve(code)));
    child.kill('SIGTERM');
    expect(await exited).toBe(0);
    expect(out).toContain('stopped');
    expect(err).toBe('');
  }, 30_000);
});
