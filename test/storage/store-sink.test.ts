import { describe, expect, it, vi } from 'vitest';
import type { RunInfo, SinkRecord } from '../../src/protocol/records.js';
import type { Store } from '../../src/storage/store.js';
import { StoreSink } from '../../src/storage/store-sink.js';

const run: RunInfo = { id: 'r1', name: 'n', group: null, tags: {}, started_at: 0, config: {}, layers: [] };
const note = (i: number): SinkRecord => ({ type: 'warning', run: 'r1', code: 'X', message: `m${i}`, step: i, time: i });

/** A store that records what it is given and can be told to refuse writes (disk full, a lock). */
function fakeStore() {
  const state = { appended: [] as SinkRecord[], transactions: 0, refuse: false, heartbeats: 0, closed: false, begun: [] as string[] };
  const store = {
    path: ':fake:',
    beginRun: (r: RunInfo) => void state.begun.push(r.id),
    append: (records: readonly SinkRecord[]) => {
      if (state.refuse) throw Object.assign(new Error('database or disk is full'), { code: 'SQLITE_FULL' });
      state.transactions++;
      state.appended.push(...records);
    },
    heartbeat: () => void state.heartbeats++,
    close: () => void (state.closed = true),
  } as unknown as Store;
  return { store, state };
}

describe('store sink', () => {
  it('stores queued records in one transaction per flush', async () => {
    const { store, state } = fakeStore();
    const sink = new StoreSink(() => store, { heartbeatIntervalMs: 60_000 });
    await sink.open(run);
    expect(state.begun).toEqual(['r1']);
    for (let i = 0; i < 5; i++) sink.write(note(i));
    sink.write({ type: 'run', run });
    await sink.flush();
    expect(state.transactions).toBe(1);
    expect(state.appended.map((r) => (r as { step: number }).step)).toEqual([0, 1, 2, 3, 4]);
    await sink.close();
    expect(state.closed).toBe(true);
  });

  it('keeps records through failed flushes and stores them, in order, once the store accepts writes', async () => {
    const { store, state } = fakeStore();
    const sink = new StoreSink(() => store, { heartbeatIntervalMs: 60_000 });
    await sink.open(run);
    state.refuse = true;
    sink.write(note(0));
    sink.write(note(1));
    await expect(sink.flush()).rejects.toThrow('disk is full');
    sink.write(note(2));
    await expect(sink.flush()).rejects.toThrow();
    state.refuse = false;
    await sink.flush();
    expect(state.appended.map((r) => (r as { step: number }).step)).toEqual([0, 1, 2]);
    expect(sink.dropped).toBe(0);
    await sink.close();
  });

  it('drops the oldest records past its bound and counts them', async () => {
    const { store, state } = fakeStore();
    const sink = new StoreSink(() => store, { heartbeatIntervalMs: 60_000, maxQueued: 3 });
    await sink.open(run);
    state.refuse = true;
    for (let i = 0; i < 5; i++) sink.write(note(i));
    await expect(sink.flush()).rejects.toThrow();
    state.refuse = false;
    await sink.close();
    expect(sink.dropped).toBe(2);
    expect(state.appended.map((r) => (r as { step: number }).step)).toEqual([2, 3, 4]);
  });

  it('heartbeats and flushes in the background, once per interval (fake timers: no sleeping, no durations)', async () => {
    vi.useFakeTimers();
    try {
      const { store, state } = fakeStore();
      const sink = new StoreSink(() => store, { heartbeatIntervalMs: 20 });
      await sink.open(run);
      sink.write(note(0));
      const before = state.heartbeats;
      await vi.advanceTimersByTimeAsync(19);
      expect(state.heartbeats).toBe(before);
      expect(state.appended.length).toBe(0);
      await vi.advanceTimersByTimeAsync(41);
      expect(state.heartbeats - before).toBe(3);
      expect(state.appended.length).toBe(1);
      await sink.close();
    } finally {
      vi.useRealTimers();
    }
  });

  it('reports a store that cannot be opened from open()', async () => {
    const sink = new StoreSink(() => {
      throw new Error('not a database');
    });
    await expect(sink.open(run)).rejects.toThrow('not a database');
  });
});

describe('StoreSink options', () => {
  const open = (): Store => {
    throw new Error('not opened in these checks');
  };
  it('suggests the option meant for a misspelt name, and refuses a negative interval', () => {
    expect(() => new StoreSink(open, { heartbeatIntervl: 5 } as never)).toThrow(
      "Unknown option 'heartbeatIntervl' of new StoreSink(). Did you mean 'heartbeatIntervalMs'?",
    );
    expect(() => new StoreSink(open, { heartbeatInterval: 5 } as never)).toThrow("Did you mean 'heartbeatIntervalMs'?");
    expect(() => new StoreSink(open, { heartbeatIntervalMs: -5 })).toThrow(
      "Option 'heartbeatIntervalMs' of new StoreSink() must be an integer from 10 to 2147483647; received -5.",
    );
    expect(() => new StoreSink(open, { maxQueued: 0 })).toThrow(/maxQueued' of new StoreSink\(\) must be an integer ≥ 1/);
  });
});
