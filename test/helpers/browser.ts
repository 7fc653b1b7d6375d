/**
 * Debian's chromium under playwright-core, for the page's end-to-end tests and the page bench: where it is,
 * how it is launched, and pixel counts that tell a drawn chart from a blank one.
 */
import { execFileSync } from 'node:child_process';
import { existsSync } from 'node:fs';
import { join } from 'node:path';
import { fileURLToPath } from 'node:url';
import { chromium, type Browser, type Page } from 'playwright-core';

export const CHROMIUM = '/usr/bin/chromium';
export const haveChromium = existsSync(CHROMIUM);
const ROOT = fileURLToPath(new URL('../../', import.meta.url));

/** Builds the page when dist/web is missing (a fresh clone before `npm run build`). */
export function ensurePageBuilt(): void {
  if (!existsSync(join(ROOT, 'dist/web/index.html'))) execFileSync(process.execPath, [join(ROOT, 'scripts/build-web.mjs')], { stdio: 'inherit' });
}

export function launchChromium(): Promise<Browser> {
  return chromium.launch({
    executablePath: CHROMIUM,
    args: ['--headless', '--no-sandbox', '--disable-gpu', '--disable-background-networking', '--disable-component-update', '--no-first-run'],
  });
}

/** Pixels of a canvas within `tol` of an RGB colour, fully opaque. */
export async function countColour(page: Page, selector: string, rgb: [number, number, number], tol = 40): Promise<number> {
  return page.$eval(
    selector,
    (c, [r, g, b, t]) => {
      const canvas = c as HTMLCanvasElement;
      const data = canvas.getContext('2d')!.getImageData(0, 0, canvas.width, canvas.height).data;
      let n = 0;
      for (let i = 0; i < data.length; i += 4) {
        if (data[i + 3]! > 200 && Math.abs(data[i]! - r!) <= t! && Math.abs(data[i + 1]! - g!) <= t! && Math.abs(data[i + 2]! - b!) <= t!) n++;
      }
      return n;
    },
    [...rgb, tol],
  );
}

/** Pixels of a canvas that are not blank (any opaque pixel that is not near white). */
export async function inkPixels(page: Page, selector: string): Promise<number> {
  return page.$eval(selector, (c) => {
    const canvas = c as HTMLCanvasElement;
    const data = canvas.getContext('2d')!.getImageData(0, 0, canvas.width, canvas.height).data;
    let n = 0;
    for (let i = 0; i < data.length; i += 4) if (data[i + 3]! > 200 && data[i]! + data[i + 1]! + data[i + 2]! < 600) n++;
    return n;
  });
}
