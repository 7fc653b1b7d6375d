/**
 * The page's ties to the server: HTTP reads (with the token from the URL, if any) and the one `/live`
 * WebSocket, reopened with a growing delay when it drops (a server restart, a sleeping laptop).
 */
import type { LiveMessage, ViewerMessage } from '../protocol/messages.js';
import { decodeJson, tokenFrom } from './model.js';

const token = tokenFrom(location.search, location.hash);

export function withToken(path: string): string {
  if (token === null) return path;
  return `${path}${path.includes('?') ? '&' : '?'}token=${encodeURIComponent(token)}`;
}

let onUnauthorized: (() => void) | null = null;

/** Called once the server answers 401: the page then asks for the token instead of retrying for ever. */
export function whenUnauthorized(f: () => void): void {
  onUnauthorized = f;
}

/** Whether the page was opened with a token (a 401 then means a wrong one). */
export const hasToken = token !== null;

export async function getJson(path: string): Promise<unknown> {
  const res = await fetch(withToken(path), { headers: { accept: 'application/json' } });
  const body = decodeJson(await res.text());
  if (res.status === 401) onUnauthorized?.();
  if (!res.ok) {
    const err = (body as { error?: { code?: string; message?: string } }).error;
    throw new Error(err?.message ?? `HTTP ${res.status}`);
  }
  return body;
}

type Listener = (m: LiveMessage) => void;

export class Live {
  private ws: WebSocket | null = null;
  private listeners = new Set<Listener>();
  private onOpen = new Set<() => void>();
  private delay = 500;
  private halted = false;

  constructor(private readonly setStatus: (text: string) => void) {
    this.connect();
  }

  private connect(): void {
    const url = new URL(withToken('live'), location.href);
    url.protocol = location.protocol === 'https:' ? 'wss:' : 'ws:';
    const ws = new WebSocket(url);
    this.ws = ws;
    ws.onopen = () => {
      this.delay = 500;
      this.setStatus('live');
      for (const f of this.onOpen) f();
    };
    ws.onmessage = (ev) => {
      const m = decodeJson(String(ev.data)) as LiveMessage;
      for (const f of this.listeners) f(m);
    };
    ws.onclose = () => {
      this.ws = null;
      if (this.halted) return;
      this.setStatus('reconnecting…');
      setTimeout(() => this.connect(), this.delay);
      this.delay = Math.min(this.delay * 2, 10_000);
    };
  }

  /** Stops for good (the server wants a token the page lacks): no more reconnecting, and `text` as the status. */
  halt(text: string): void {
    this.halted = true;
    this.ws?.close();
    this.setStatus(text);
  }

  send(m: ViewerMessage): void {
    if (this.ws?.readyState === WebSocket.OPEN) this.ws.send(JSON.stringify(m));
  }

  get open(): boolean {
    return this.ws?.readyState === WebSocket.OPEN;
  }

  /** Calls `f` now if connected and again after every reconnect; returns the unsubscriber. */
  whenOpen(f: () => void): () => void {
    this.onOpen.add(f);
    if (this.open) f();
    return () => this.onOpen.delete(f);
  }

  listen(f: Listener): () => void {
    this.listeners.add(f);
    return () => this.listeners.delete(f);
  }
}
