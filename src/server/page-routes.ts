/**
 * What the browser loads and what a health check asks: the page at `/` (built into dist/web by
 * `npm run build`), its bundle under `/static/`, the icon and `/healthz`. None of them carries data.
 */
import { existsSync } from 'node:fs';
import { readFile, stat } from 'node:fs/promises';
import { resolve as resolvePath, sep } from 'node:path';
import { fileURLToPath } from 'node:url';
import type { FastifyPluginAsync } from 'fastify';
import { TidemarkError } from '../errors.js';
import type { ServerContext } from './context.js';

export type PageRoutesOptions = {
  ctx: ServerContext;
  /** The page at `/`; undefined: the built page, else a placeholder. */
  page: string | undefined;
};

const PLACEHOLDER = `<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>tidemark</title></head>
<body><h1>tidemark</h1><p>The server is running. The live page comes with a later version; meanwhile the
runs are at <a href="api/runs">api/runs</a> and the metrics at <a href="metrics">metrics</a>.</p></body></html>
`;

/** The built page (`npm run build` bundles src/web here): dist/web, from src/server as from dist/server. */
const WEB_DIR = resolvePath(fileURLToPath(new URL('../../dist/web/', import.meta.url)));

const STATIC_TYPES: Record<string, string> = {
  '.js': 'text/javascript; charset=utf-8',
  '.css': 'text/css; charset=utf-8',
  '.map': 'application/json; charset=utf-8',
  '.html': 'text/html; charset=utf-8',
  '.svg': 'image/svg+xml',
  '.png': 'image/png',
};

/** A file of the page's bundle: only a regular file inside `${WEB_DIR}/static`, never a path that resolves out of it. */
async function staticFile(name: string): Promise<{ body: Buffer; type: string } | null> {
  const dir = resolvePath(WEB_DIR, 'static');
  const file = resolvePath(dir, name);
  if (!file.startsWith(dir + sep) || name.includes('\0')) return null;
  const type = STATIC_TYPES[file.slice(file.lastIndexOf('.'))];
  if (type === undefined) return null;
  try {
    if (!(await stat(file)).isFile()) return null;
    return { body: await readFile(file), type };
  } catch {
    return null;
  }
}

/** A wave under a dashed line: the tide and its mark. */
export const FAVICON_SVG =
  "<svg xmlns='http://www.w3.org/2000/svg' viewBox='0 0 16 16'><path d='M1 10c2-3 4-3 7 0s5 3 7 0' fill='none' stroke='#0b6e75' stroke-width='2'/><path d='M2 4h12' stroke='#889' stroke-width='1.5' stroke-dasharray='2 2'/></svg>";

/** The paths served here: they carry no data, so they need no token. */
export function carriesNoData(path: string): boolean {
  return path === '/healthz' || path === '/' || path === '/favicon.ico' || path.startsWith('/static/');
}

/** `/`, `/static/*`, `/favicon.ico` and `/healthz`. */
export const pageRoutes: FastifyPluginAsync<PageRoutesOptions> = async (app, { ctx, page: givenPage }) => {
  app.get('/healthz', async () => ({ status: 'ok' }));
  // The page names its icon inline; browsers that ask for /favicon.ico anyway get the same drawing, not a 404.
  app.get('/favicon.ico', async (_req, reply) => reply.type('image/svg+xml').header('cache-control', 'max-age=86400').send(FAVICON_SVG));

  // The page: the `page` option when given, else the built page in dist/web, else (not built) the placeholder.
  const builtPage = existsSync(resolvePath(WEB_DIR, 'index.html')) ? resolvePath(WEB_DIR, 'index.html') : null;
  app.get('/', async (_req, reply) => {
    const page = givenPage ?? (builtPage === null ? PLACEHOLDER : await readFile(builtPage, 'utf8').catch(() => PLACEHOLDER));
    return reply.type('text/html; charset=utf-8').header('cache-control', 'no-cache').send(page);
  });
  app.get('/static/*', async (req, reply) => {
    const name = (req.params as Record<string, string | undefined>)['*'] ?? '';
    const found = await staticFile(name);
    if (found === null) return ctx.sendError(reply, new TidemarkError('TIDEMARK_ERR_NOT_FOUND', `No file static/${name.slice(0, 100)}.`));
    return reply.type(found.type).header('cache-control', 'no-cache').send(found.body);
  });
};
