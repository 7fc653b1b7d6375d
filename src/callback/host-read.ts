/**
 * Reading a gradient's values on the host without allocating. On wasm, dataSync slices a fresh copy
 * out of the module's heap every time (84 kB a step for the reference model, and garbage-collection
 * pauses inside training steps); copying into a buffer we reuse costs a memcpy instead. The wasm
 * backend's internal layout is not public API, so every read is checked and anything unexpected
 * falls back to dataSync.
 */
import * as tf from '@tensorflow/tfjs';

type Values = ArrayLike<number>;

interface TensorInfoLike {
  memoryOffset?: unknown;
  dtype?: unknown;
}

interface WasmBackendLike {
  dataIdMap?: { get(id: object): TensorInfoLike | undefined };
  wasm?: { HEAPF32?: Float32Array };
}

/** The wasm backend's tensor table and heap, looked up once for the reads of one step. */
export interface WasmHeap {
  readonly table: { get(id: object): TensorInfoLike | undefined };
  readonly heap: Float32Array;
}

/** The current backend's heap when it is wasm and laid out as expected, else null (reads use dataSync). */
export function wasmHeap(): WasmHeap | null {
  if (tf.getBackend() !== 'wasm') return null;
  const backend = tf.backend() as unknown as WasmBackendLike;
  const table = backend.dataIdMap;
  // HEAPF32 is replaced when the module's memory grows: look it up again for every step.
  const heap = backend.wasm?.HEAPF32;
  return table !== undefined && heap !== undefined ? { table, heap } : null;
}

/**
 * Values of `t`: with `into`, copied into it (straight out of the wasm heap, which avoids dataSync's
 * allocation, or from dataSync); without, or when `t` is not float32 of `into`'s length, what dataSync gives.
 */
export function readValues(t: tf.Tensor, into: Float32Array | null, wasm: WasmHeap | null = into === null ? null : wasmHeap()): Values {
  if (into === null || t.dtype !== 'float32' || into.length !== t.size) return t.dataSync() as Values;
  if (wasm !== null) {
    const info = wasm.table.get(t.dataId as object);
    if (info !== undefined && info.dtype === 'float32' && typeof info.memoryOffset === 'number') {
      const start = info.memoryOffset >> 2;
      if (start * 4 === info.memoryOffset && start + into.length <= wasm.heap.length) {
        into.set(wasm.heap.subarray(start, start + into.length));
        return into;
      }
    }
  }
  const values = t.dataSync() as Values;
  if (!(values instanceof Float32Array) || values.length !== into.length) return values;
  into.set(values);
  return into;
}

/**
 * True on the backends whose gradients reach the host as float32 arrays for a memcpy (cpu: its own
 * arrays, wasm: its heap): there the accumulator copies them into the SIMD kernel's memory and folds them
 * there, which costs less than folding them in JavaScript.
 */
export function foldsInKernel(): boolean {
  const backend = tf.getBackend();
  return backend === 'wasm' || backend === 'cpu';
}

/** True where reading into a reusable buffer saves an allocation (the wasm backend). */
export function benefitsFromBuffers(): boolean {
  return tf.getBackend() === 'wasm';
}
