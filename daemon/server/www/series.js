// series.js: series of samples (docs/api.md, "Series"): the list, and one
// series with each sample's runs and replicate statistics. A series is
// started with `stopcock series start` or POST /v1/series; the station card
// shows what a going series asks of the operator.
import {api, get, h, fmt, when, errorText, confirmAction} from './api.js';

function runLinks(runs) {
	if (!runs.length) return '—';
	const out = [];
	for (const r of runs) {
		if (out.length) out.push(' ');
		out.push(h('a', {href: `#/run/${r}`}, String(r)));
	}
	return out;
}

export function seriesListView(root) {
	const body = h('tbody');
	const msg = h('p', {class: 'view-error', role: 'alert'});
	root.append(h('h1', {}, 'Series'), msg,
		h('div', {class: 'card'}, h('table', {class: 'runs-table'},
			h('thead', {}, h('tr', {}, h('th', {}, 'series'), h('th', {}, 'station'),
				h('th', {}, 'state'), h('th', {}, 'samples'), h('th', {}, 'created'),
				h('th', {}, 'waits for'))), body)));
	return {
		every_ms: 3000,
		async refresh() {
			let data;
			try {
				data = await get('/v1/series?limit=50');
				msg.textContent = '';
			} catch (e) {
				msg.textContent = `series not read: ${errorText(e)}`;
				return;
			}
			body.replaceChildren(...data.series.map((s) => h('tr', {},
				h('td', {}, h('a', {href: `#/series/${s.id}`}, String(s.id))),
				h('td', {}, s.station),
				h('td', {}, h('span', {class: `badge state-${s.state}`}, s.state)),
				h('td', {}, String(s.samples.length)),
				h('td', {}, when(s.created_at)),
				h('td', {}, s.prompt || ''))));
		},
	};
}

export function seriesView(root, id) {
	const head = h('p', {class: 'current'});
	const detail = h('p', {class: 'station-error', role: 'status'});
	const body = h('tbody');
	const note = h('p', {class: 'form-note', role: 'status'});
	const next = h('button', {type: 'button', class: 'primary'}, 'Beaker placed');
	const abort = h('button', {type: 'button', class: 'halt'}, 'Abort series');
	next.addEventListener('click', async () => {
		try {
			await api('POST', `/v1/series/${id}/next`);
			note.textContent = 'the series goes on';
		} catch (e) {
			note.textContent = `not moved on: ${errorText(e)}`;
		}
	});
	abort.addEventListener('click', async () => {
		if (!(await confirmAction(`Abort series ${id}?`,
			'Its current run is aborted (the burette halted) and nothing more of it is queued.',
			'Abort series')))
			return;
		try {
			await api('POST', `/v1/series/${id}/abort`);
			note.textContent = 'abort asked';
		} catch (e) {
			note.textContent = `not aborted: ${errorText(e)}`;
		}
	});
	root.append(h('h1', {}, `Series ${id}`), head, detail, h('p', {}, next, ' ', abort), note,
		h('div', {class: 'card'}, h('table', {class: 'result-table'},
			h('thead', {}, h('tr', {}, h('th', {}, 'sample'), h('th', {}, 'method'),
				h('th', {}, 'amount'), h('th', {}, 'positions'), h('th', {}, 'runs'),
				h('th', {}, 'result'), h('th', {}, 'n'), h('th', {}, 'mean'), h('th', {}, 'SD'),
				h('th', {}, 'RSD, %'), h('th', {}, 'accept'), h('th', {}, 'outliers'))), body)));
	return {
		every_ms: 2000,
		async refresh() {
			let s;
			try {
				s = await get(`/v1/series/${id}`);
			} catch (e) {
				detail.textContent = `series not read: ${errorText(e)}`;
				return;
			}
			head.replaceChildren(`station ${s.station} · `,
				h('span', {class: `badge state-${s.state}`}, s.state),
				` · on_failure ${s.on_failure} · created ${when(s.created_at)}` +
				(s.ended_at ? ` · ended ${when(s.ended_at)}` : ''));
			detail.textContent = s.prompt ? `waits: ${s.prompt}` : (s.detail || '');
			next.hidden = !s.waiting;
			abort.hidden = !['queued', 'running'].includes(s.state);
			const rows = [];
			for (const x of s.samples) {
				const names = Object.keys(x.stats || {});
				const first = [h('td', {}, x.sample_id), h('td', {}, x.method),
					h('td', {}, typeof x.amount === 'string' ? x.amount : fmt(x.amount, 4)), h('td', {}, x.position.join(' ')),
					h('td', {}, runLinks(x.runs))];
				if (!names.length) {
					rows.push(h('tr', {}, ...first, h('td', {colspan: 7}, '—')));
					continue;
				}
				names.forEach((name, i) => {
					const st = x.stats[name];
					const cells = i === 0 ? first : first.map(() => h('td', {}));
					rows.push(h('tr', {}, ...cells, h('td', {}, name), h('td', {}, String(st.n)),
						h('td', {}, fmt(st.mean, 6)), h('td', {}, fmt(st.sd, 6)),
						h('td', {}, fmt(st.rsd_pct, 3)),
						h('td', {}, h('span', {class: `accept-${st.accept}`}, st.accept)),
						h('td', {}, runLinks(st.outliers))));
				});
			}
			body.replaceChildren(...rows);
		},
	};
}
