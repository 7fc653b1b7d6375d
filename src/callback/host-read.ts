/**
 * Reading a gradient's values on the host without allocating. On wasm, dataSync slices a fresh copy
 * out of the module's heap every time (84 kB a step for the reference model, and garbage-collection
 * pauses inside training steps); copying into a buffer we reuse costs a memcpy instead. The wasm
 * backend's internal layout is not public API, so every step is checked and anything unexpected
 * falls back to dataSync.
 */
import * as tf from '@tensorflow/tfjs';

type Values = ArrayLike<number>;

interface WasmBackendLike {
  dataIdMap?: { get(id: object): { memoryOffset?: unknown; dtype?: unknown } | undefined };
  wasm?: { HEAPF32?: Float32Array };
}

/** Values of `t`, copied into `into` where that avoids an allocation; otherwise what dataSync gives. */
export function readValues(t: tf.Tensor, into: Float32Array | null): Values {
  if (into !== null && t.dtype === 'float32' && into.length === t.size && tf.getBackend() === 'wasm') {
    const backend = tf.backend() as unknown as WasmBackendLike;
    const info = backend.dataIdMap?.get(t.dataId as object);
    const heap = backend.wasm?.HEAPF32;
    if (info !== undefined && info.dtype === 'float32' && typeof info.memoryOffset === 'number' && heap !== undefined) {
      const start = info.memoryOffset >> 2;
      if (start * 4 === info.memoryOffset && start + into.length <= heap.length) {
        into.set(heap.subarray(start, start + into.length));
        return into;
      }
    }
  }
  return t.dataSync() as Values;
}

/** True where reading into a reusable buffer saves an allocation (the wasm backend). */
export function benefitsFromBuffers(): boolean {
  return tf.getBackend() === 'wasm';
}
