import { describe, expect, it } from 'vitest';
import type { Marker } from '../../src/protocol/records.js';
import { CAUTION, adviceSentence, decodeJson, latestAdvice, mergeRuns, parseRoute, runHash, runMatches, snrColumns, tokenFrom } from '../../src/web/model.js';
import { layerStyle, OKABE_ITO } from '../../src/web/palette.js';
import { fakeRun, fakeWindows } from '../helpers/window-records.js';

const summary = (id: string, over: Partial<Parameters<typeof runMatches>[0]> = {}) => ({
  id,
  name: `run ${id}`,
  group: null,
  tags: {},
  status: 'running' as const,
  created_at: 1,
  ended_at: null,
  last_step: null,
  windows: 0,
  ...over,
});

describe('page model', () => {
  it('filters runs by every word against name, group and tags', () => {
    const r = summary('a1', { name: 'gearbox', group: 'sweep-3', tags: { lr: '0.05', opt: 'adam' } });
    expect(runMatches(r, '')).toBe(true);
    expect(runMatches(r, 'GEAR')).toBe(true);
    expect(runMatches(r, 'sweep-3 lr=0.05')).toBe(true);
    expect(runMatches(r, 'adam')).toBe(true);
    expect(runMatches(r, 'lr=0.1')).toBe(false);
    expect(runMatches(r, 'gearbox sgd')).toBe(false);
  });

  it('merges live rows into the list by id, newest first', () => {
    const list = mergeRuns([], [summary('a', { created_at: 1 }), summary('b', { created_at: 2 })]);
    expect(list.map((r) => r.id)).toEqual(['b', 'a']);
    const next = mergeRuns(list, [summary('a', { created_at: 1, status: 'finished', last_step: 40 }), summary('c', { created_at: 3 })]);
    expect(next.map((r) => r.id)).toEqual(['c', 'b', 'a']);
    expect(next.find((r) => r.id === 'a')?.status).toBe('finished');
  });

  it('reads the route and the token from the URL', () => {
    expect(parseRoute('')).toEqual({ view: 'runs' });
    expect(parseRoute('#/')).toEqual({ view: 'runs' });
    expect(parseRoute(runHash('run/x y'))).toEqual({ view: 'run', id: 'run/x y' });
    expect(parseRoute('#/run/abc?token=secret-123')).toEqual({ view: 'run', id: 'abc' });
    expect(parseRoute('#/run/%E0%A4%A')).toEqual({ view: 'run', id: '%E0%A4%A' });
    expect(tokenFrom('?token=t1', '')).toBe('t1');
    expect(tokenFrom('', '#/run/a?token=t2')).toBe('t2');
    expect(tokenFrom('', '#token=t3')).toBe('t3');
    expect(tokenFrom('', '#/run/a')).toBeNull();
  });

  it('decodes the protocol non-finite strings', () => {
    expect(decodeJson('{"a":"NaN","b":"-Infinity","c":"x"}')).toEqual({ a: Number.NaN, b: -Infinity, c: 'x' });
  });

  it('turns windows into sorted chart columns with gaps for non-finite values', () => {
    const run = fakeRun({ id: 'r' });
    const ws = fakeWindows(run, 6);
    const cols = snrColumns(
      run.layers.map((l) => l.name),
      [ws[3]!, ws[0]!, ...ws, ws[5]!],
    );
    expect(cols.steps).toEqual([8, 16, 24, 32, 40, 48]);
    expect(cols.labels).toEqual(['dense_Dense1', 'dense_Dense2', 'dense_Dense3', '(network)']);
    expect(cols.series).toHaveLength(4);
    // fakeWindows puts -Infinity dB in window 4.
    expect(cols.series[0]![4]).toBeNull();
    expect(cols.series[0]![1]).toBeCloseTo(ws[1]!.layers.dense_Dense1!.grad_snr_db, 12);
    expect(cols.series[3]![1]).toBeCloseTo(ws[1]!.network.grad_snr_db, 12);
    expect(cols.floor[0]).toBeCloseTo(20 * Math.log10(1 / Math.sqrt(8)), 12);
  });

  it('reports the latest advice and keeps the caution about held-out data', () => {
    const m = (detected_step: number, verdict: string): Marker => ({ run: 'r', layer: null, kind: 'advice', step: detected_step, detected_step, confidence: 1, details: { verdict, reason: `r${detected_step}` } });
    expect(latestAdvice([])).toEqual({ verdict: 'continue', reason: null, step: null });
    const a = latestAdvice([m(50, 'stop'), m(10, 'may-stop')]);
    expect(a).toEqual({ verdict: 'stop', reason: 'r50', step: 50 });
    expect(adviceSentence(a)).toContain('since step 50');
    expect(adviceSentence(latestAdvice([]))).toContain('keep training');
    expect(CAUTION).toMatch(/estimates.*held-out data/);
  });

  it('styles layers from the Okabe & Ito palette, changing dash once the colours run out', () => {
    expect(layerStyle(0)).toEqual({ stroke: OKABE_ITO.blue, dash: [] });
    expect(layerStyle(7).stroke).toBe(OKABE_ITO.blue);
    expect(layerStyle(7).dash).not.toEqual([]);
    expect(new Set(Array.from({ length: 7 }, (_, i) => layerStyle(i).stroke)).size).toBe(7);
  });
});
