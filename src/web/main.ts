/**
 * The tidemark page: the runs list, one run's view, or 2 to 6 runs compared, fed by the HTTP API and the
 * `/live` WebSocket (docs/protocol.md). The view lives in the URL fragment (`#/run/<id>`,
 * `#/compare/<id>,<id>`) so a link reopens it; a token given as `?token=` travels with every request.
 */
import 'uplot/dist/uPlot.min.css';
import './style.css';
import { Live } from './connection.js';
import { compareView } from './compare-view.js';
import { el, type View } from './dom.js';
import { parseRoute } from './model.js';
import { runView } from './run-view.js';
import { runsView } from './runs-view.js';

const root = document.getElementById('app')!;
const statusEl = el('span', { class: 'conn', 'data-testid': 'connection', role: 'status' }, 'connecting…');
const live = new Live((text) => {
  statusEl.textContent = text;
});

let current: View | null = null;

function render(): void {
  current?.dispose();
  root.replaceChildren();
  const route = parseRoute(location.hash);
  current = route.view === 'run' ? runView(root, live, route.id, route.range) : route.view === 'compare' ? compareView(root, live, route.ids, route.range) : runsView(root, live);
  // A new view: move focus to its heading, so keyboard and screen-reader users start at the top of it.
  const heading = root.querySelector('h2');
  if (heading !== null) {
    heading.tabIndex = -1;
    heading.focus({ preventScroll: true });
  }
}

document.getElementById('conn-slot')?.append(statusEl);
window.addEventListener('hashchange', render);
render();
