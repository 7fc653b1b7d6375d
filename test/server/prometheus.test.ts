/**
 * Outside checks of /metrics with the reference tools of the format (Debian package `prometheus`):
 * promtool reads the server's Prometheus-text answer, and a real Prometheus scrapes the OpenMetrics answer
 * and returns a value through its HTTP query API. Required in CI (.ci/run installs the package); skipped
 * locally, with the reason, when the package is not installed.
 */
import { spawn, spawnSync, type ChildProcess } from 'node:child_process';
import { existsSync, mkdtempSync, rmSync, writeFileSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { afterAll, describe, expect, it } from 'vitest';
import { startServer, type RunningServer } from '../../src/server/serve.js';
import { openStore } from '../../src/storage/sqlite-store.js';
import type { SinkRecord } from '../../src/protocol/records.js';
import { freePort } from '../helpers/server-child.js';
import { fakeMarkers, fakeRun, fakeWindows } from '../helpers/window-records.js';

const PROMETHEUS = ['/usr/bin/prometheus', '/usr/local/bin/prometheus'].find((p) => existsSync(p)) ?? null;
const PROMTOOL = ['/usr/bin/promtool', '/usr/local/bin/promtool'].find((p) => existsSync(p)) ?? null;
const IN_CI = Boolean(process.env.CI);
const dir = mkdtempSync(join(tmpdir(), 'tidemark-prom-'));
const children: ChildProcess[] = [];
const servers: RunningServer[] = [];
afterAll(async () => {
  for (const c of children) c.kill('SIGKILL');
  for (const s of servers) await s.close();
  rmSync(dir, { recursive: true, force: true });
});


async function seededServer(): Promise<{ server: RunningServer; runId: string; lastStep: number }> {
  const store = openStore(join(dir, `m-${servers.length}.db`));
  const run = fakeRun({ id: `prom-run-${servers.length}`, name: 'gearbox "quoted" \\ name\nwith newline' });
  const ws = fakeWindows(run, 5);
  store.beginRun(run);
  store.append([...ws.map((window): SinkRecord => ({ type: 'window', window })), ...fakeMarkers(run).map((marker): SinkRecord => ({ type: 'marker', marker }))]);
  const server = await startServer({ store, port: 0, pollMs: 1000 });
  servers.push(server);
  return { server, runId: run.id, lastStep: ws.at(-1)!.step };
}

describe.skipIf(!IN_CI && (PROMETHEUS === null || PROMTOOL === null))('/metrics against Prometheus 2.x (Debian package prometheus; skipped locally when not installed, required in CI)', () => {
  it('passes promtool check metrics in the text format it reads (Prometheus 0.0.4)', async () => {
    expect(PROMTOOL, 'promtool not found: CI must install the Debian package "prometheus"').not.toBeNull();
    const { server } = await seededServer();
    const res = await fetch(`${server.url}/metrics`, { headers: { accept: 'text/plain;version=0.0.4' } });
    expect(res.headers.get('content-type')).toBe('text/plain; version=0.0.4; charset=utf-8');
    const body = await res.text();
    const r = spawnSync(PROMTOOL!, ['check', 'metrics'], { input: body, encoding: 'utf8' });
    expect(r.stdout + r.stderr).toBe('');
    expect(r.status).toBe(0);
  });

  it('is scraped as OpenMetrics by a real Prometheus, which then answers a query with the stored value', async () => {
    expect(PROMETHEUS, 'prometheus not found: CI must install the Debian package "prometheus"').not.toBeNull();
    const { server, runId, lastStep } = await seededServer();
    const port = await freePort();
    const config = join(dir, 'prometheus.yml');
    writeFileSync(
      config,
      [
        'global:',
        '  scrape_interval: 1s',
        'scrape_configs:',
        '  - job_name: tidemark',
        '    scrape_interval: 1s',
        `    static_configs: [{ targets: ['127.0.0.1:${server.port}'] }]`,
        '',
      ].join('\n'),
    );
    const child = spawn(
      PROMETHEUS!,
      [`--config.file=${config}`, `--storage.tsdb.path=${join(dir, 'tsdb')}`, `--web.listen-address=127.0.0.1:${port}`, '--log.level=warn'],
      { stdio: ['ignore', 'ignore', 'pipe'] },
    );
    children.push(child);
    let log = '';
    child.stderr!.on('data', (d: Buffer) => (log += String(d)));
    const query = `tidemark_last_step{run="${runId}"}`;
    let value: string | null = null;
    let health = '';
    const deadline = Date.now() + 30_000;
    while (Date.now() < deadline && value === null) {
      await new Promise((r) => setTimeout(r, 500));
      try {
        const q = (await (await fetch(`http://127.0.0.1:${port}/api/v1/query?query=${encodeURIComponent(query)}`)).json()) as {
          data?: { result?: { value: [number, string] }[] };
        };
        value = q.data?.result?.[0]?.value[1] ?? null;
        const t = (await (await fetch(`http://127.0.0.1:${port}/api/v1/targets`)).json()) as { data?: { activeTargets?: { health: string; lastError: string }[] } };
        const target = t.data?.activeTargets?.[0];
        health = target === undefined ? '' : `${target.health} ${target.lastError}`;
      } catch {
        // Prometheus still starting.
      }
    }
    expect(value, `no value from Prometheus; target: ${health}; log: ${log.slice(-2000)}`).toBe(String(lastStep));
    expect(health.trim()).toBe('up');
  }, 60_000);
});
