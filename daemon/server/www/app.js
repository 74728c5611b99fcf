// app.js: the bench page's router and its one polling loop.
//
// Each view is an object {every_ms, refresh()}: the loop calls refresh, waits
// every_ms after it finishes (never overlapping, so an open page sends at
// most a few requests a second), and backs off while the daemon does not
// answer. Every refresh reads whole records again, so the page is right
// again as soon as a restarted daemon answers.
import {setupToken, linkIsDown, errorText, h} from './api.js';
import {stationsView} from './stations.js';
import {runView, runsView} from './runs.js';
import {methodsView, methodView, editorView} from './methods.js';
import {calibrationView} from './calib.js';
import {seriesListView, seriesView} from './series.js';

const BACKOFF_MS = 3000;

const routes = [
	[/^#\/stations$/, 'stations', (root) => stationsView(root)],
	[/^#\/runs$/, 'runs', (root) => runsView(root)],
	[/^#\/run\/(\d+)$/, 'runs', (root, m) => runView(root, Number(m[1]))],
	[/^#\/series$/, 'series', (root) => seriesListView(root)],
	[/^#\/series\/(\d+)$/, 'series', (root, m) => seriesView(root, Number(m[1]))],
	[/^#\/methods$/, 'methods', (root) => methodsView(root)],
	[/^#\/method\/([a-z0-9-]+)$/, 'methods', (root, m) => methodView(root, m[1])],
	[/^#\/method\/([a-z0-9-]+)\/edit$/, 'methods', (root, m) => editorView(root, m[1])],
	[/^#\/calibration$/, 'calibration', (root) => calibrationView(root, 0)],
	[/^#\/calibration\/(\d+)$/, 'calibration', (root, m) => calibrationView(root, Number(m[1]))],
];

let generation = 0;
let timer = 0;

async function tick(view, gen) {
	if (gen !== generation) return;
	try {
		await view.refresh();
	} catch (e) {
		// Views report their own errors; this catches a throw before that.
		console.warn('refresh:', errorText(e));
	}
	if (gen !== generation || !view.every_ms) return;
	timer = setTimeout(() => tick(view, gen), linkIsDown() ? Math.max(BACKOFF_MS, view.every_ms)
		: view.every_ms);
}

function route() {
	const hash = location.hash || '#/stations';
	const main = document.getElementById('main');
	generation++;
	clearTimeout(timer);
	main.replaceChildren();
	let found = null;
	for (const [re, nav, make] of routes) {
		const m = re.exec(hash);
		if (m) {
			found = {nav, make, m};
			break;
		}
	}
	for (const a of document.querySelectorAll('nav a'))
		a.toggleAttribute('aria-current', !!found && a.dataset.nav === found.nav);
	if (!found) {
		main.append(h('h1', {}, 'Not a view of this page'),
			h('p', {}, h('a', {href: '#/stations'}, 'Go to the stations')));
		return;
	}
	const view = found.make(main, found.m);
	document.title = `Stopcock · ${main.querySelector('h1')?.textContent || found.nav}`;
	tick(view, generation);
}

setupToken();
window.addEventListener('hashchange', () => {
	route();
	document.getElementById('main').focus({preventScroll: true});
});
route();
