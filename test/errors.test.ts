import { readFileSync } from 'node:fs';
import { describe, expect, it } from 'vitest';
import { ERROR_CODES, TidemarkError } from '../src/index.js';

describe('error catalogue', () => {
  const doc = readFileSync(new URL('../docs/errors.md', import.meta.url), 'utf8');

  it('documents every code in docs/errors.md', () => {
    const documented = new Set([...doc.matchAll(/^\| `(TIDEMARK_ERR_[A-Z_]+)` \|/gm)].map((m) => m[1]));
    expect([...documented].sort()).toEqual(Object.keys(ERROR_CODES).sort());
  });

  it('carries the code, the message and the cause', () => {
    const cause = new Error('inner');
    const e = new TidemarkError('TIDEMARK_ERR_SINK_OPEN', 'could not open', { cause });
    expect(e).toBeInstanceOf(Error);
    expect(e).toMatchObject({ name: 'TidemarkError', code: 'TIDEMARK_ERR_SINK_OPEN', message: 'could not open', cause });
  });
});
