import { describe, expect, it } from 'vitest';
import { parseSinkAddress } from '../../src/storage/sink-address.js';

describe('parseSinkAddress', () => {
  it('names the kind of store each string selects', () => {
    expect(parseSinkAddress('memory')).toEqual({ kind: 'memory' });
    expect(parseSinkAddress('ws://10.0.0.2:7341?token=abcdefgh')).toEqual({ kind: 'server', url: 'ws://10.0.0.2:7341?token=abcdefgh' });
    expect(parseSinkAddress('HTTPS://box.lan')).toEqual({ kind: 'server', url: 'HTTPS://box.lan' });
    expect(parseSinkAddress('postgresql://u@db/runs?schema=a')).toEqual({ kind: 'postgres', url: 'postgresql://u@db/runs?schema=a' });
    expect(parseSinkAddress('runs/a.jsonl')).toEqual({ kind: 'jsonl', path: 'runs/a.jsonl' });
    expect(parseSinkAddress('tidemark.db')).toEqual({ kind: 'sqlite', path: 'tidemark.db' });
    // A Windows drive path is a file, not a URL with scheme "C".
    expect(parseSinkAddress('C:\\runs\\t.db')).toEqual({ kind: 'sqlite', path: 'C:\\runs\\t.db' });
  });

  it('refuses other URLs and the empty string with a coded error naming what to use', () => {
    for (const bad of ['mysql://db/runs', 'file:///tmp/x.db', 's3://bucket/runs', '']) {
      expect(() => parseSinkAddress(bad), bad).toThrow(expect.objectContaining({ code: 'TIDEMARK_ERR_OPTION_INVALID', message: expect.stringMatching(/postgres:\/\//) }));
    }
  });
});
