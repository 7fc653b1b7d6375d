/**
 * The group view's arithmetic without a browser: its address both ways, which tags can be swept, a band's
 * outline on a log scale, the fitted line's ends (y = e^a·x^b, worked by hand), and which live updates
 * concern the group.
 */
import { describe, expect, it } from 'vitest';
import type { Band } from '../../src/analysis/group-bands.js';
import type { RunSummary } from '../../src/protocol/messages.js';
import { bandPath, groupHash, groupQuery, groupRouteOf, groupTouched, numericTags, sweepLine, sweepSentence } from '../../src/web/group-model.js';
import { parseRoute } from '../../src/web/model.js';
import type { SweepReport } from '../../src/storage/group-report.js';

const band = (median: number, n = 3): Band => ({ n, min: median - 2, q1: median - 1, median, q3: median + 1, max: median + 2 });

describe('group view model', () => {
  it('writes and reads its address, defaults left out, an odd name escaped', () => {
    const r = { name: 'depth sweep/β', align: 'epoch' as const, sweep: 'depth', outcome: 'loss-target' as const, lossTarget: 0.3 };
    const hash = groupHash(r);
    expect(hash).toBe('#/group/depth%20sweep%2F%CE%B2?align=epoch&sweep=depth&outcome=loss-target&target=0.3');
    expect(parseRoute(hash)).toEqual({ view: 'group', group: r });
    expect(groupHash({ ...r, align: 'step', sweep: null, outcome: 'diffusion-start', lossTarget: null })).toBe('#/group/depth%20sweep%2F%CE%B2');
    // Unknown values fall back to the defaults instead of an error page.
    expect(groupRouteOf('g', new URLSearchParams('align=week&outcome=best&target=-1'))).toEqual({ name: 'g', align: 'step', sweep: null, outcome: 'diffusion-start', lossTarget: null });
    expect(groupQuery(r)).toBe('api/groups/depth%20sweep%2F%CE%B2?align=epoch&points=40&sweep=depth&outcome=loss-target&lossTarget=0.3');
  });

  it('offers the tags that are a positive number in two runs or more, with two values at least', () => {
    const runs: { tags: Record<string, string> }[] = [{ tags: { depth: '1', lr: '0.1', note: 'a', batch: '32' } }, { tags: { depth: '2', lr: '0.1', note: 'b', batch: '0' } }, { tags: { depth: '4' } }];
    expect(numericTags(runs)).toEqual(['depth']);
  });

  it('outlines a band where a run has a value; on a log scale only where its lowest run is positive', () => {
    const bands = [band(5), { n: 0, min: NaN, q1: NaN, median: NaN, q3: NaN, max: NaN }, band(1), band(10, 1)];
    expect(bandPath([1, 2, 4, 8], bands, false)).toEqual({ x: [1, 4, 8], min: [3, -1, 8], q1: [4, 0, 9], median: [5, 1, 10], q3: [6, 2, 11], max: [7, 3, 12], n: [3, 3, 1] });
    expect(bandPath([1, 2, 4, 8], bands, true).x).toEqual([1, 8]);
  });

  it("draws the fit from the smallest to the largest x: y = e^a·x^b (hand-worked: a = ln 100, b = 0.5)", () => {
    const w = { tag: 'depth', outcome: 'diffusion-start', units: 'steps', points: [{ run: 'a', x: 1, y: 90 }, { run: 'b', x: 4, y: 210 }, { run: 'c', x: 9, y: 300 }], left: [], residuals: [], bootstrap: { low: 0.3, high: 0.7 }, fit: { slope: 0.5, intercept: Math.log(100), slopeStdError: 0.05, residualVariance: 0.01, rSquared: 0.98, n: 3, ci95: [0.2, 0.8] } } as SweepReport;
    const line = sweepLine(w);
    expect(line[0]!.x).toBe(1);
    expect(line[0]!.y).toBeCloseTo(100, 9);
    expect(line[1]!.x).toBe(9);
    expect(line[1]!.y).toBeCloseTo(300, 9);
    expect(sweepSentence(w)).toBe('Exponent b = 0.500, 95 % interval [0.200, 0.800] (Student-t over 3 runs); [0.300, 0.700] by bootstrap over runs; R² 0.980.');
    expect(sweepSentence({ ...w, fit: null, points: w.points.slice(0, 2) })).toContain('3 needed; 2 now');
  });

  it('hears a live update only when a run of the group is new or moved', () => {
    const seen = new Map<string, string>();
    const run = (id: string, group: string | null, windows: number): RunSummary => ({ id, name: id, group, tags: {}, status: 'running', created_at: 0, windows, last_step: windows * 8 }) as RunSummary;
    expect(groupTouched(seen, 'g', [run('a', 'g', 1), run('b', 'other', 1)])).toBe(true);
    expect(groupTouched(seen, 'g', [run('a', 'g', 1), run('b', 'other', 5)])).toBe(false);
    expect(groupTouched(seen, 'g', [run('a', 'g', 2)])).toBe(true);
    expect(groupTouched(seen, 'g', [run('c', 'g', 0)])).toBe(true);
  });
});
