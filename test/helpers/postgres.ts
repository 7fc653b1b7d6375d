/**
 * A throwaway PostgreSQL cluster for the tests: initdb into a temporary folder, started with pg_ctl on a
 * free loopback port, trust authentication for one role, fsync off (a test cluster need not survive a
 * power loss), stopped and removed at the end. As root (CI) the server runs as the `postgres` user, since
 * PostgreSQL refuses to run as root. Never relies on a server that happens to be up.
 *
 * Where the binaries are missing: in CI (CI set) that is an error, since the PostgreSQL tests are required
 * there (.ci/run installs Debian's `postgresql`); elsewhere the tests are skipped with {@link postgresMissing}.
 */
import { execFileSync, spawnSync } from 'node:child_process';
import { chmodSync, chownSync, existsSync, mkdtempSync, readdirSync, readFileSync, rmSync } from 'node:fs';
import { tmpdir } from 'node:os';
import { join } from 'node:path';
import { freePort } from './server-child.js';

const IN_CI = Boolean(process.env.CI);

function findBinDir(): string | null {
  const fromEnv = process.env.TIDEMARK_PG_BIN;
  if (fromEnv !== undefined && existsSync(join(fromEnv, 'pg_ctl'))) return fromEnv;
  const root = '/usr/lib/postgresql';
  if (existsSync(root)) {
    const versions = readdirSync(root)
      .filter((v) => existsSync(join(root, v, 'bin', 'pg_ctl')))
      .sort((a, b) => Number(b) - Number(a));
    if (versions.length > 0) return join(root, versions[0]!, 'bin');
  }
  return null;
}

const BIN = findBinDir();

/** Why the PostgreSQL tests cannot run here, or null when they can. In CI a missing server is a failure, not a skip. */
export const postgresMissing: string | null =
  BIN === null && !IN_CI ? 'no PostgreSQL server binaries (apt-get install postgresql, or set TIDEMARK_PG_BIN)' : null;

export interface PgCluster {
  /** postgres://tidemark@127.0.0.1:PORT/postgres */
  url: string;
  port: number;
  /** A URL of another database on the same cluster. */
  urlOf(database: string): string;
  /** Stops the server at once (no checkpoint) and removes its folder. */
  stop(): void;
}

const asRoot = typeof process.getuid === 'function' && process.getuid() === 0;

function pgRun(tool: string, args: string[]): void {
  if (BIN === null) {
    throw new Error('PostgreSQL server binaries not found: CI must install them (apt-get install -y postgresql); locally set TIDEMARK_PG_BIN.');
  }
  const cmd = join(BIN, tool);
  const r = asRoot
    ? spawnSync('runuser', ['-u', 'postgres', '--', cmd, ...args], { encoding: 'utf8', timeout: 60_000 })
    : spawnSync(cmd, args, { encoding: 'utf8', timeout: 60_000 });
  if (r.status !== 0) throw new Error(`${tool} ${args.join(' ')} failed (${r.status}): ${r.stderr || r.stdout || String(r.error)}`);
}

/** Starts a fresh cluster; call stop() in afterAll. */
export async function startPostgres(): Promise<PgCluster> {
  const dir = mkdtempSync(join(tmpdir(), 'tidemark-pg-'));
  chmodSync(dir, 0o700);
  if (asRoot) {
    const uid = Number(execFileSync('id', ['-u', 'postgres'], { encoding: 'utf8' }).trim());
    const gid = Number(execFileSync('id', ['-g', 'postgres'], { encoding: 'utf8' }).trim());
    chownSync(dir, uid, gid);
  }
  const data = join(dir, 'data');
  const log = join(dir, 'server.log');
  pgRun('initdb', ['-D', data, '-A', 'trust', '-U', 'tidemark', '-E', 'UTF8', '--locale=C', '--no-sync']);
  const port = await freePort();
  const options = `-p ${port} -k ${dir} -c listen_addresses=127.0.0.1 -c fsync=off -c synchronous_commit=off -c full_page_writes=off`;
  try {
    pgRun('pg_ctl', ['-D', data, '-o', options, '-l', log, '-w', '-t', '60', 'start']);
  } catch (e) {
    const tail = existsSync(log) ? readFileSync(log, 'utf8').slice(-2000) : '';
    rmSync(dir, { recursive: true, force: true });
    throw new Error(`${(e as Error).message}\n${tail}`);
  }
  const urlOf = (database: string): string => `postgres://tidemark@127.0.0.1:${port}/${database}`;
  return {
    url: urlOf('postgres'),
    port,
    urlOf,
    stop(): void {
      try {
        pgRun('pg_ctl', ['-D', data, '-m', 'immediate', '-w', 'stop']);
      } finally {
        rmSync(dir, { recursive: true, force: true });
      }
    },
  };
}
