/** A small element builder for the page's views. */
export function el<K extends keyof HTMLElementTagNameMap>(tag: K, attrs: Record<string, string> = {}, ...children: (Node | string)[]): HTMLElementTagNameMap[K] {
  const e = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs)) e.setAttribute(k, v);
  e.append(...children);
  return e;
}

const SVG_NS = 'http://www.w3.org/2000/svg';

/** The same for SVG drawings. */
export function svg<K extends keyof SVGElementTagNameMap>(tag: K, attrs: Record<string, string | number> = {}, ...children: (Node | string)[]): SVGElementTagNameMap[K] {
  const e = document.createElementNS(SVG_NS, tag);
  for (const [k, v] of Object.entries(attrs)) e.setAttribute(k, String(v));
  e.append(...children);
  return e;
}

/** What a view gives back to the router: how to take it down before the next one is drawn. */
export interface View {
  dispose(): void;
}

/**
 * A box that scrolls sideways when its table is wider than the screen, with a line that says so while it is
 * (on a phone a table's last columns would otherwise be out of sight with nothing to tell).
 */
export function scrollBox(child: HTMLElement): HTMLElement {
  const hint = el('p', { class: 'scroll-hint note', 'data-testid': 'scroll-hint' }, 'Wider than the screen: scroll sideways for more columns →');
  hint.hidden = true;
  const box = el('div', { class: 'scroll' }, child);
  const check = (): void => {
    hint.hidden = !(box.scrollWidth > box.clientWidth + 1);
  };
  if (typeof ResizeObserver === 'function') {
    const ro = new ResizeObserver(check);
    ro.observe(box);
    ro.observe(child);
  }
  requestAnimationFrame(check);
  return el('div', { class: 'scroll-wrap' }, hint, box);
}
