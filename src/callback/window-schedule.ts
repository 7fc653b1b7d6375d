/**
 * When a window of minibatches closes. SGD's dynamics run on a logarithmic time scale, so the
 * default 'auto' schedule starts short (8 steps) and grows ×1.25 a window until it reaches an
 * epoch, then follows epoch ends: an epoch-long window cannot resolve a drift that ends in two.
 */
import type { WindowSetting } from './options.js';

export const AUTO_FIRST_WINDOW = 8;
export const AUTO_GROWTH = 1.25;
/** A window needs two minibatch gradients for a spread; shorter ones merge into the next. */
export const MIN_WINDOW = 2;
/** Outside fit there are no epochs to grow into; 'auto' windows stop growing here. */
export const AUTO_MAX_WITHOUT_EPOCHS = 1024;

export class WindowSchedule {
  private readonly setting: WindowSetting;
  private autoIndex = 0;

  constructor(setting: WindowSetting) {
    this.setting = setting;
  }

  /** Target length of the current window in steps, before epoch alignment. */
  target(batchesPerEpoch: number | null = null): number {
    if (typeof this.setting === 'number') return this.setting;
    const grown = Math.round(AUTO_FIRST_WINDOW * AUTO_GROWTH ** this.autoIndex);
    return batchesPerEpoch === null ? Math.min(grown, AUTO_MAX_WITHOUT_EPOCHS) : grown;
  }

  /** True once windows follow epoch ends. */
  followsEpochs(batchesPerEpoch: number | null, inFit: boolean): boolean {
    if (!inFit) return false;
    if (this.setting === 'epoch') return true;
    if (this.setting === 'auto') return batchesPerEpoch !== null && this.target(batchesPerEpoch) >= batchesPerEpoch;
    return false;
  }

  /** After a minibatch: close now? */
  closeAfterStep(steps: number, batchesPerEpoch: number | null, inFit: boolean): boolean {
    if (this.followsEpochs(batchesPerEpoch, inFit)) return false;
    // 'epoch' outside fit has no epochs to follow: grow like 'auto'.
    return steps >= Math.max(MIN_WINDOW, this.target(batchesPerEpoch));
  }

  /** At an epoch end: close now? */
  closeAtEpochEnd(steps: number, batchesPerEpoch: number | null): boolean {
    return steps >= MIN_WINDOW && this.followsEpochs(batchesPerEpoch, true);
  }

  closed(): void {
    if (typeof this.setting !== 'number') this.autoIndex++;
  }
}
