/**
 * `tidemark serve` in a child process, for tests and benches that kill it, restart it or read its memory.
 */
import { spawn, type ChildProcess } from 'node:child_process';
import { readFileSync } from 'node:fs';
import { createServer } from 'node:net';
import { fileURLToPath } from 'node:url';

const ROOT = fileURLToPath(new URL('../..', import.meta.url));
const CLI = fileURLToPath(new URL('../../src/cli/bin.ts', import.meta.url));

/** A loopback port free a moment ago (another process may take it before it is used). */
export async function freePort(): Promise<number> {
  const s = createServer();
  await new Promise<void>((resolve) => s.listen(0, '127.0.0.1', resolve));
  const port = (s.address() as { port: number }).port;
  await new Promise<void>((resolve) => s.close(() => resolve()));
  return port;
}

export interface ServerChild {
  proc: ChildProcess;
  pid: number;
  port: number;
  http: string;
  ws: string;
  /** SIGTERM, then the exit. */
  stop(): Promise<void>;
}

/**
 * Starts `tidemark serve --db DB --port PORT [args]` and resolves once it says it is serving. Its stderr is
 * echoed with the pid, and collected in `stderr` when given.
 */
export function startServerChild(db: string, options: { port: number; args?: string[]; stderr?: string[] }): Promise<ServerChild> {
  const { port } = options;
  const proc = spawn(process.execPath, ['--import', 'tsx', CLI, 'serve', '--db', db, '--port', String(port), ...(options.args ?? [])], {
    cwd: ROOT,
    stdio: ['ignore', 'pipe', 'pipe'],
  });
  proc.stderr!.on('data', (d: Buffer) => {
    options.stderr?.push(String(d));
    process.stderr.write(`[server ${proc.pid}] ${String(d)}`);
  });
  return new Promise((resolve, reject) => {
    let out = '';
    const t = setTimeout(() => reject(new Error(`server did not start: ${out}`)), 30_000);
    proc.stdout!.on('data', (d: Buffer) => {
      out += String(d);
      if (out.includes('serving')) {
        clearTimeout(t);
        resolve({
          proc,
          pid: proc.pid!,
          port,
          http: `http://127.0.0.1:${port}`,
          ws: `ws://127.0.0.1:${port}`,
          stop: async () => {
            if (proc.exitCode !== null || proc.signalCode !== null) return;
            const exited = new Promise((r) => proc.once('exit', r));
            proc.kill('SIGTERM');
            await exited;
          },
        });
      }
    });
    proc.once('exit', (code) => {
      clearTimeout(t);
      reject(new Error(`server exited with ${code}: ${out}`));
    });
  });
}

/** VmRSS of a process, MiB (Linux). */
export function rssMb(pid: number): number {
  const m = /^VmRSS:\s+(\d+)\s+kB/m.exec(readFileSync(`/proc/${pid}/status`, 'utf8'));
  if (m === null) throw new Error(`no VmRSS in /proc/${pid}/status`);
  return Number(m[1]) / 1024;
}
