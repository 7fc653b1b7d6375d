/* global process, console, URL */
// Bundles the page (src/web) into dist/web: index.html, and static/app.js + static/app.css (esbuild).
// Run after tsc by `npm run build`; the server serves dist/web at `/` and `/static/…`.
import { copyFile, mkdir, rm } from 'node:fs/promises';
import { fileURLToPath } from 'node:url';
import { build } from 'esbuild';

const root = fileURLToPath(new URL('..', import.meta.url));
const out = `${root}dist/web`;

try {
  await rm(out, { recursive: true, force: true });
  await mkdir(`${out}/static`, { recursive: true });
  await build({
    entryPoints: { app: `${root}src/web/main.ts` },
    outdir: `${out}/static`,
    bundle: true,
    format: 'esm',
    target: ['es2022'],
    minify: true,
    sourcemap: true,
    logLevel: 'warning',
  });
  await copyFile(`${root}src/web/index.html`, `${out}/index.html`);
} catch (e) {
  console.error('build-web:', e instanceof Error ? e.message : e);
  process.exit(1);
}
