/** The server's page routes: the built page at `/`, the bundle under /static/, nothing outside dist/web/static. */
import { existsSync, readFileSync } from 'node:fs';
import { execFileSync } from 'node:child_process';
import { fileURLToPath } from 'node:url';
import { afterAll, beforeAll, describe, expect, it } from 'vitest';
import { buildServer, type TidemarkServer } from '../../src/server/app.js';
import { openStore, type SqliteStore } from '../../src/storage/sqlite-store.js';

const ROOT = fileURLToPath(new URL('../../', import.meta.url));

describe('page and static files', () => {
  let store: SqliteStore;
  let server: TidemarkServer;
  beforeAll(async () => {
    if (!existsSync(`${ROOT}dist/web/index.html`)) execFileSync(process.execPath, [`${ROOT}scripts/build-web.mjs`], { stdio: 'inherit' });
    store = openStore(':memory:');
    server = await buildServer({ store, token: 'static-token-123', onError: () => {} });
  });
  afterAll(async () => {
    await server.close();
    store.close();
  });

  it('serves the built page and its bundle without the token, the API only with it', async () => {
    const page = await server.app.inject('/');
    expect(page.statusCode).toBe(200);
    expect(page.body).toBe(readFileSync(`${ROOT}dist/web/index.html`, 'utf8'));
    const js = await server.app.inject('/static/app.js');
    expect(js.statusCode).toBe(200);
    expect(js.headers['content-type']).toContain('text/javascript');
    expect(js.body.length).toBeGreaterThan(1000);
    expect((await server.app.inject('/static/app.css')).headers['content-type']).toContain('text/css');
    expect((await server.app.inject('/api/runs')).statusCode).toBe(401);
  });

  it('refuses paths that leave the bundle folder, and unknown files', async () => {
    // No token here, so a path that escaped would be answered rather than refused for the token.
    const open = await buildServer({ store, onError: () => {} });
    for (const url of ['/static/../index.html', '/static/%2e%2e/index.html', '/static/..%2f..%2fpackage.json', '/static/%2e%2e%2f%2e%2e%2f%2e%2e%2fpackage.json', '/static/nope.js', '/static/', '/static/app.js%00.css']) {
      const res = await open.app.inject(url);
      expect(res.statusCode, url).toBe(404);
      expect(res.body, url).not.toContain('"name": "tidemark"');
      expect(res.body, url).not.toContain('<!doctype');
    }
    await open.close();
  });

  it('keeps the given page option over the built page', async () => {
    const s = await buildServer({ store, page: '<p>custom</p>', onError: () => {} });
    try {
      expect((await s.app.inject('/')).body).toBe('<p>custom</p>');
    } finally {
      await s.close();
    }
  });
});
