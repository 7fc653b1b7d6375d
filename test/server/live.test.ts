/**
 * The live hub with stand-in sockets: a viewer that reads too slowly loses messages instead of growing
 * the server's memory, and learns where its gap starts; a viewer that stops answering pings is ended.
 */
import { afterEach, describe, expect, it, vi } from 'vitest';
import type { WebSocket } from 'ws';
import type { LiveMessage } from '../../src/protocol/messages.js';
import { LiveHub } from '../../src/server/live.js';
import { decodeJson } from '../../src/storage/sink.js';
import { fakeRun, fakeWindows } from '../helpers/window-records.js';

class FakeSocket {
  readonly OPEN = 1;
  readyState = 1;
  bufferedAmount = 0;
  sent: LiveMessage[] = [];
  pings = 0;
  terminated = false;
  private handlers = new Map<string, (() => void)[]>();
  send(text: string): void {
    this.sent.push(decodeJson(text) as LiveMessage);
  }
  ping(): void {
    this.pings++;
  }
  terminate(): void {
    this.terminated = true;
    this.readyState = 3;
    for (const h of this.handlers.get('close') ?? []) h();
  }
  on(event: string, fn: () => void): this {
    this.handlers.set(event, [...(this.handlers.get(event) ?? []), fn]);
    return this;
  }
  emit(event: string): void {
    for (const h of this.handlers.get(event) ?? []) h();
  }
}

const run = fakeRun({ id: 'live-hub-run' });
const windows = fakeWindows(run, 10);
let hub: LiveHub | null = null;
afterEach(() => {
  hub?.close();
  hub = null;
  vi.useRealTimers();
});

describe('a slow viewer', () => {
  it('misses windows while its buffer is over the limit, then gets a gap naming the last step it has, then the stream again', () => {
    hub = new LiveHub({ bufferLimit: 1000, heartbeatMs: 60_000 });
    const socket = new FakeSocket();
    const viewer = hub.add(socket as unknown as WebSocket);
    viewer.runs.add(run.id);
    viewer.lastStep.set(run.id, null);
    hub.publishWindow(windows[0]!);
    hub.publishWindow(windows[1]!);
    socket.bufferedAmount = 5000; // the viewer stopped reading
    for (const w of windows.slice(2, 6)) hub.publishWindow(w);
    expect(socket.sent.map((m) => m.type)).toEqual(['window', 'window']);
    expect(hub.counters.dropped).toBe(4);
    socket.bufferedAmount = 0; // it caught up
    hub.publishWindow(windows[6]!);
    expect(socket.sent.slice(2)).toEqual([
      { v: 1, type: 'gap', run: run.id, after_step: windows[1]!.step },
      { v: 1, type: 'window', window: windows[6] },
    ]);
    // A window at or before what the viewer has is never sent twice.
    hub.publishWindow(windows[6]!);
    expect(socket.sent.length).toBe(4);
  });

  it('does not slow the others: a fast viewer of the same run gets every window', () => {
    hub = new LiveHub({ bufferLimit: 1000, heartbeatMs: 60_000 });
    const slow = new FakeSocket();
    const fast = new FakeSocket();
    for (const s of [slow, fast]) {
      const v = hub.add(s as unknown as WebSocket);
      v.runs.add(run.id);
    }
    slow.bufferedAmount = 10_000;
    for (const w of windows) hub.publishWindow(w);
    expect(fast.sent.map((m) => (m as Extract<LiveMessage, { type: 'window' }>).window.index)).toEqual(windows.map((w) => w.index));
    expect(slow.sent).toEqual([]);
  });
});

describe('heartbeats', () => {
  it('pings every interval and ends a viewer that did not answer the previous ping', () => {
    vi.useFakeTimers();
    hub = new LiveHub({ bufferLimit: 1000, heartbeatMs: 15_000 });
    const answering = new FakeSocket();
    const silent = new FakeSocket();
    hub.add(answering as unknown as WebSocket);
    hub.add(silent as unknown as WebSocket);
    vi.advanceTimersByTime(15_000);
    expect([answering.pings, silent.pings]).toEqual([1, 1]);
    answering.emit('pong');
    vi.advanceTimersByTime(15_000);
    expect(silent.terminated).toBe(true);
    expect(answering.terminated).toBe(false);
    expect(hub.size).toBe(1);
  });
});
