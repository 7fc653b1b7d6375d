/**
 * What importing the monitor loads (issue 14): the packages reachable from src/callback/monitor.ts through
 * static imports (`import … from`, `export … from`; not `import type`, not `import()`), followed through the
 * project's own files. A monitor that writes to memory, a JSON Lines file or a server must not load the
 * server (fastify, ajv) or a database driver (better-sqlite3, pg): those load when first asked for.
 */
import { existsSync, readFileSync } from 'node:fs';
import { dirname, join, resolve } from 'node:path';
import { fileURLToPath } from 'node:url';
import { describe, expect, it } from 'vitest';

const SRC = fileURLToPath(new URL('../../src/', import.meta.url));

/** Static value imports of one file: [relative files, bare packages]. */
function importsOf(file: string): { files: string[]; packages: string[] } {
  const text = readFileSync(file, 'utf8');
  const files: string[] = [];
  const packages: string[] = [];
  // `import x from 'y'`, `import { a } from 'y'`, `import 'y'`, `export { a } from 'y'`, `export * from 'y'`; type-only ones skipped.
  const re = /^\s*(import|export)\s+(type\s+)?([^'";]*?\s+from\s+)?['"]([^'"]+)['"]/gm;
  for (const m of text.matchAll(re)) {
    if (m[2] !== undefined) continue;
    if (m[1] === 'export' && m[3] === undefined) continue;
    const spec = m[4]!;
    if (spec.startsWith('.')) files.push(resolve(dirname(file), spec.replace(/\.js$/, '.ts')));
    else packages.push(spec.startsWith('@') ? spec.split('/').slice(0, 2).join('/') : spec.split('/')[0]!);
  }
  return { files, packages };
}

function packagesReachable(entry: string): Set<string> {
  const seen = new Set<string>();
  const packages = new Set<string>();
  const stack = [entry];
  while (stack.length > 0) {
    const f = stack.pop()!;
    if (seen.has(f)) continue;
    seen.add(f);
    expect(existsSync(f), `${f} exists`).toBe(true);
    const { files, packages: p } = importsOf(f);
    stack.push(...files);
    for (const x of p) packages.add(x);
  }
  return packages;
}

describe('import graph', () => {
  it('finds static imports and skips type-only and dynamic ones (checked on a file written here)', () => {
    const found = importsOf(join(SRC, 'storage/connect-store.ts'));
    // connect-store imports async-store statically and both drivers only dynamically.
    expect(found.files.map((f) => f.slice(SRC.length))).toEqual(['storage/async-store.ts', 'storage/store-url.ts']);
    expect(found.packages).toEqual([]);
    expect(packagesReachable(join(SRC, 'storage/sqlite-store.ts')).has('better-sqlite3')).toBe(true);
    expect(packagesReachable(join(SRC, 'server/serve.ts')).has('fastify')).toBe(true);
  });

  it('loads neither the server nor a database driver when the monitor is imported', () => {
    const packages = packagesReachable(join(SRC, 'callback/monitor.ts'));
    for (const heavy of ['fastify', 'ajv', 'better-sqlite3', 'pg']) expect(packages.has(heavy), heavy).toBe(false);
    expect(packages.has('@tensorflow/tfjs')).toBe(true);
  });
});
