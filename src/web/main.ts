/**
 * The tidemark page: the runs list, one run's view, or 2 to 6 runs compared, fed by the HTTP API and the
 * `/live` WebSocket (docs/protocol.md). The view lives in the URL fragment (`#/run/<id>`,
 * `#/compare/<id>,<id>`, `#/group/<name>`) so a link reopens it; a token given as `?token=` travels with every request.
 */
import 'uplot/dist/uPlot.min.css';
import './style.css';
import { hasToken, Live, whenUnauthorized } from './connection.js';
import { compareView } from './compare-view.js';
import { el, type View } from './dom.js';
import { groupView } from './group-view.js';
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
  current =
    route.view === 'run'
      ? runView(root, live, route.id, route.range)
      : route.view === 'compare'
        ? compareView(root, live, route.ids, route.range)
        : route.view === 'group'
          ? groupView(root, live, route.group)
          : runsView(root, live);
  // A new view: move focus to its heading, so keyboard and screen-reader users start at the top of it.
  const heading = root.querySelector('h2');
  if (heading !== null) {
    heading.tabIndex = -1;
    heading.focus({ preventScroll: true });
  }
}

/** The server wants a token this page was not given (or a wrong one): ask for it, and reopen with it. */
function askForToken(): void {
  if (document.querySelector('[data-testid="token-form"]') !== null) return;
  live.halt('needs a token');
  const input = el('input', { type: 'password', 'data-testid': 'token-input', autocomplete: 'off', required: '' });
  const form = el(
    'form',
    { class: 'token', 'data-testid': 'token-form' },
    el('p', {}, hasToken ? 'The server refused this token. ' : 'This server asks for a token. ', "Enter the one 'tidemark serve' was started with (--token or $TIDEMARK_TOKEN); it stays in this page's address."),
    el('label', {}, 'Token ', input),
    ' ',
    el('button', { type: 'submit' }, 'Open'),
  );
  form.addEventListener('submit', (ev) => {
    ev.preventDefault();
    const url = new URL(location.href);
    url.searchParams.set('token', input.value);
    location.assign(url.href);
  });
  root.replaceChildren(form);
  input.focus();
}

whenUnauthorized(askForToken);
document.getElementById('conn-slot')?.append(statusEl);
window.addEventListener('hashchange', render);
render();
