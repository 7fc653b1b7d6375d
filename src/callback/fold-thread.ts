/**
 * A worker thread that runs the block fold (SimdFold.foldAll) while training goes on: on the wasm
 * backend in Node, tfjs computes on one thread and a second core is idle, so the fold of four
 * minibatches no longer waits inside a training step. The thread and the training thread share the
 * arena's memory and hand a fold over through four int32 words of it (Atomics). At most one fold is in
 * flight; the training thread touches the sums only when none is. While training, the worker looks for
 * work four times per interval between folds and sleeps after a while without any (see MIN_POLL_MS). A fold the worker has not picked up
 * when its result is needed (the worker still starting, or gone) is taken back and run here instead, so
 * nothing ever waits on a thread that does not run. The CPU time is the same: it is moved, not saved.
 */
import { createRequire } from 'node:module';
import type { Worker } from 'node:worker_threads';
import type { SimdFold } from '../analysis/simd-fold.js';
import { TidemarkError } from '../errors.js';

// The hand-over words (SimdFold.control): state, block set, sign, and whether the worker sleeps.
const STATE = 0;
const SET = 1;
const SIGN = 2;
const SLEEPING = 3;
const IDLE = 0;
const ASKED = 1;
const CLAIMED = 2;
const DONE = 3;
const QUIT = 4;
const FAILED = 5;
/**
 * While folds keep coming the worker looks for the next one now and then instead of sleeping until it is
 * woken: waking a sleeping thread (Atomics.notify) costs the training thread 10–30 µs, more than a third of
 * the fold it hands over. It looks four times per interval between folds (from 1 to 50 ms apart), so a
 * fold is picked up long before its result is needed, at a few hundred wake-ups a second at most. After
 * ten intervals (at least a second) without a fold it sleeps, and a request wakes it.
 */
const MIN_POLL_MS = 1;
const MAX_POLL_MS = 50;
const MIN_ACTIVE_MS = 1000;

/** The worker, a CommonJS script. It waits on the state word, claims a request, folds, and says done. */
const WORKER_SOURCE = `
const { workerData, parentPort } = require('node:worker_threads');
const { module, memory, control, calls } = workerData;
const kernel = new WebAssembly.Instance(module, { env: { memory } }).exports;
const words = new Int32Array(memory.buffer, control, 4);
// Written by this thread only: ms spent folding, and wake-ups to look for work.
const counters = new Float64Array(memory.buffer, control + 16, 2);
parentPort.postMessage('ready');
let lastFold = Date.now();
let gap = ${MIN_POLL_MS * 4};
for (;;) {
  let s = Atomics.load(words, ${STATE});
  while (s !== ${ASKED} && s !== ${QUIT}) {
    if (Date.now() - lastFold < Math.max(${MIN_ACTIVE_MS}, 10 * gap)) {
      Atomics.wait(words, ${STATE}, s, Math.min(${MAX_POLL_MS}, Math.max(${MIN_POLL_MS}, gap / 4)));
      counters[1] += 1;
    } else {
      // Say so before the last look: a request stored after it sees SLEEPING and wakes us.
      Atomics.store(words, ${SLEEPING}, 1);
      s = Atomics.load(words, ${STATE});
      if (s !== ${ASKED} && s !== ${QUIT}) Atomics.wait(words, ${STATE}, s);
      Atomics.store(words, ${SLEEPING}, 0);
      lastFold = Date.now();
    }
    s = Atomics.load(words, ${STATE});
  }
  if (s === ${QUIT}) break;
  if (Atomics.compareExchange(words, ${STATE}, ${ASKED}, ${CLAIMED}) !== ${ASKED}) continue;
  const t = Date.now();
  gap = 0.8 * gap + 0.2 * (t - lastFold);
  let end = ${DONE};
  const started = performance.now();
  try {
    const c = calls[Atomics.load(words, ${SET})];
    kernel.fold4(c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7], c[8], Atomics.load(words, ${SIGN}) === 1 ? 1 : -1);
  } catch {
    end = ${FAILED};
  }
  counters[0] += performance.now() - started;
  lastFold = Date.now();
  Atomics.store(words, ${STATE}, end);
  // On this thread's time: wakes the training thread if it waits for this fold.
  Atomics.notify(words, ${STATE});
}
`;

/** How long a claimed fold may take before it is called lost (it takes well under a millisecond). */
const CLAIMED_LIMIT_MS = 10_000;

export class FoldThread {
  private readonly fold: SimdFold;
  private readonly worker: Worker;
  private readonly words: Int32Array;
  private inFlight = false;
  private closed = false;
  private readonly counters: Float64Array;
  private readonly counts = { thread: 0, here: 0, waits: 0, waitMs: 0 };
  /** Resolves true once the worker waits for folds, false if it stopped or could not start. */
  readonly ready: Promise<boolean>;

  private constructor(fold: SimdFold, worker: Worker) {
    this.fold = fold;
    this.worker = worker;
    this.words = fold.control;
    this.counters = new Float64Array(fold.control.buffer, fold.control.byteOffset + 16, 2);
    this.ready = new Promise((resolve) => {
      worker.once('message', () => resolve(true));
      worker.once('error', () => resolve(false));
      worker.once('exit', () => resolve(false));
    });
  }

  /**
   * A thread folding in `fold`'s memory, or null where that cannot be (no shared memory, no worker
   * threads: a browser, or a runtime without them). The worker starts in the background; until it runs,
   * folds run on the calling thread.
   */
  static start(fold: SimdFold): FoldThread | null {
    if (!(fold.memory.buffer instanceof SharedArrayBuffer)) return null;
    let WorkerClass: typeof Worker;
    try {
      const require = createRequire(import.meta.url);
      WorkerClass = (require('node:worker_threads') as typeof import('node:worker_threads')).Worker;
    } catch {
      return null;
    }
    Atomics.store(fold.control, STATE, IDLE);
    Atomics.store(fold.control, SLEEPING, 0);
    new Float64Array(fold.control.buffer, fold.control.byteOffset + 16, 2).fill(0);
    let worker: Worker;
    try {
      worker = new WorkerClass(WORKER_SOURCE, {
        eval: true,
        workerData: { module: fold.module, memory: fold.memory, control: fold.control.byteOffset, calls: fold.calls },
      });
    } catch {
      return null;
    }
    // Never keep the process alive, and never let a worker's failure reach the user's process: a fold
    // the worker does not take runs here.
    worker.unref();
    worker.on('error', () => {});
    return new FoldThread(fold, worker);
  }

  /**
   * Folds run by the worker and, because it had not picked them up, on the calling thread; how often, and
   * how long in all (ms), the calling thread waited for the worker to finish one; the worker's time in
   * folds (ms, on its own core) and its wake-ups to look for work. Counts of the worker are read as they
   * stand (they may trail by a fold in flight).
   */
  get folds(): { thread: number; here: number; waits: number; waitMs: number; workerMs: number; wakeups: number } {
    return { ...this.counts, workerMs: this.counters[0]!, wakeups: this.counters[1]! };
  }

  /** Hands the fold of block set `set` to the worker. The sums must not be touched until {@link finish}. */
  request(set: number, sign: 1 | -1): void {
    if (this.inFlight) throw new Error('FoldThread.request: a fold is already in flight; call finish() first');
    if (this.closed) {
      this.fold.foldAll(sign, set);
      this.counts.here++;
      return;
    }
    const w = this.words;
    Atomics.store(w, SET, set);
    Atomics.store(w, SIGN, sign);
    Atomics.store(w, STATE, ASKED);
    if (Atomics.load(w, SLEEPING) === 1) Atomics.notify(w, STATE);
    this.inFlight = true;
  }

  /**
   * Waits for the fold in flight, if any (runs it here if the worker has not picked it up); afterwards
   * its results are in SimdFold.results and the sums may be read and changed.
   */
  finish(): void {
    if (!this.inFlight) return;
    this.inFlight = false;
    // Closed with a fold in flight (dispose): its result is not wanted.
    if (this.closed) return;
    const w = this.words;
    const set = Atomics.load(w, SET);
    const sign = Atomics.load(w, SIGN) === 1 ? 1 : -1;
    if (Atomics.compareExchange(w, STATE, ASKED, IDLE) === ASKED) {
      this.fold.foldAll(sign, set);
      this.counts.here++;
      return;
    }
    const start = performance.now();
    for (let round = 0; ; round++) {
      const s = Atomics.load(w, STATE);
      if (s === DONE) {
        Atomics.store(w, STATE, IDLE);
        this.counts.thread++;
        if (round > 0) {
          this.counts.waits++;
          this.counts.waitMs += performance.now() - start;
        }
        return;
      }
      if (s === FAILED || performance.now() - start > CLAIMED_LIMIT_MS) {
        Atomics.store(w, STATE, IDLE);
        this.close();
        throw new TidemarkError(
          'TIDEMARK_ERR_STATISTIC',
          `The fold thread ${s === FAILED ? 'failed on' : 'did not finish within 10 s'} a block of four minibatches: this window's gradient statistics may be wrong. Folds now run on the training thread; if this repeats, report it with your tfjs backend and Node version.`,
        );
      }
      Atomics.wait(w, STATE, CLAIMED, 100);
    }
  }

  /** Stops the worker. Later requests fold on the calling thread. */
  close(): void {
    if (this.closed) return;
    this.closed = true;
    if (Atomics.load(this.words, STATE) !== CLAIMED) {
      Atomics.store(this.words, STATE, QUIT);
      Atomics.notify(this.words, STATE);
    }
    void this.worker.terminate().catch(() => {});
  }
}
