/** What counts as a point: one numeric value of a window (its layers, their variables, the network, the logs). */
import type { WindowRecord } from './records.js';

export function windowPoints(w: WindowRecord): number {
  let n = 0;
  const count = (o: object): void => {
    for (const v of Object.values(o)) {
      if (typeof v === 'number') n++;
      else if (v !== null && typeof v === 'object' && !Array.isArray(v)) count(v as object);
    }
  };
  count(w.layers);
  count(w.network);
  count(w.logs);
  return n;
}
