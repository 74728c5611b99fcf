// stations.js: every station at a glance: state, live reading and its age,
// the burette, the sample changer (position and head), the current run, the
// series going on it (with what it asks of the operator), a start form and
// the halt button.
import {api, get, h, fmt, errorText, confirmAction} from './api.js';

const STALE_S = 5; // a reading older than this is flagged (the engine halts dosing on stale ones)

function field(label, cls) {
	const v = h('span', {class: `value ${cls || ''}`}, '—');
	return {el: h('div', {class: 'field'}, h('span', {class: 'label'}, label), v), v};
}

function card(name, methods) {
	const state = h('span', {class: 'badge'}, '…');
	const phase = h('span', {class: 'phase'});
	const ph = field('pH', 'big');
	const mv = field('mV');
	const temp = field('°C');
	const age = field('reading age');
	const bar = h('progress', {max: 1, value: 0, 'aria-label': `burette of ${name}`});
	const bur = h('span', {class: 'burette-text'}, '—');
	// The sample changer, on a station that has one: where the rack is and
	// whether the head is in a beaker (docs/operations.md, "A rack of samples").
	const chgText = h('span', {class: 'changer-text'}, '—');
	const changer = h('div', {class: 'changer', hidden: true},
		h('span', {class: 'label'}, 'changer'), chgText);
	const position = h('input', {name: 'position', id: `position-${name}`, type: 'number',
		step: '1', min: '1', placeholder: 'rack position'});
	const positionRow = h('span', {class: 'position', hidden: true},
		h('label', {for: position.id}, 'Position'), position);
	const run = h('span', {class: 'run-link'}, 'none');
	const queued = h('span', {}, '0');
	const err = h('p', {class: 'station-error', role: 'alert'});
	const note = h('p', {class: 'form-note', role: 'status'});
	const halt = h('button', {type: 'button', class: 'halt', 'data-halt': name, 'data-needs': 'operate'},
		'HALT');
	// After a restart a station that had a run is held until someone has
	// looked at the beaker (docs/operations.md, "After a stop or a crash").
	const heldWhy = h('span', {class: 'held-reason'});
	const resume = h('button', {type: 'button', class: 'primary resume', 'data-needs': 'operate'},
		'Resume');
	const held = h('div', {class: 'held', role: 'status', hidden: true},
		h('strong', {}, 'Held: '), heldWhy, ' ', resume);
	// A series without a changer asks for each beaker (docs/api.md, "Series").
	let seriesId = 0;
	const seriesLink = h('span', {});
	const seriesPrompt = h('span', {class: 'series-prompt'});
	const next = h('button', {type: 'button', class: 'primary series-next', 'data-needs': 'operate'}, 'Beaker placed');
	const stopSeries = h('button', {type: 'button', class: 'series-abort', 'data-needs': 'operate'}, 'Abort series');
	const series = h('div', {class: 'series', role: 'status', hidden: true},
		h('strong', {}, 'Series '), seriesLink, ' ', seriesPrompt, ' ', next, ' ', stopSeries);
	next.addEventListener('click', async () => {
		try {
			await api('POST', `/v1/series/${seriesId}/next`);
		} catch (e) {
			err.textContent = `series not moved on: ${errorText(e)}`;
		}
	});
	stopSeries.addEventListener('click', async () => {
		if (!(await confirmAction(`Abort series ${seriesId}?`,
			`Its current run is aborted (the burette halted) and nothing more of it is queued.`,
			'Abort series')))
			return;
		try {
			await api('POST', `/v1/series/${seriesId}/abort`);
		} catch (e) {
			err.textContent = `series not aborted: ${errorText(e)}`;
		}
	});
	const method = h('select', {name: 'method', id: `method-${name}`, required: true});
	const sample = h('input', {name: 'sample', id: `sample-${name}`, required: true,
		autocomplete: 'off', placeholder: 'e.g. OLC-batch-12'});
	const amount = h('input', {name: 'amount', id: `amount-${name}`, type: 'number',
		step: 'any', min: '0', required: true, value: '10'});
	const unit = h('span', {class: 'unit'}, 'mL or g, as the method says');
	const form = h('form', {class: 'start', 'aria-label': `start a run on ${name}`, 'data-needs': 'operate'},
		h('h3', {}, 'Start a run'),
		h('label', {for: method.id}, 'Method'), method,
		h('label', {for: sample.id}, 'Sample id'), sample,
		h('label', {for: amount.id}, 'Amount'), h('span', {class: 'amount'}, amount, unit),
		positionRow,
		h('button', {type: 'submit', class: 'primary'}, 'Start'), note);
	const setMethods = (list) => {
		const keep = method.value;
		method.replaceChildren(...list.map((m) => h('option', {value: m.id},
			`${m.id} (rev ${m.revision})`)));
		if (list.some((m) => m.id === keep)) method.value = keep;
	};
	setMethods(methods);
	form.addEventListener('submit', async (ev) => {
		ev.preventDefault();
		note.textContent = 'starting…';
		try {
			const body = {station: name, method: method.value,
				sample_id: sample.value.trim(), amount: Number(amount.value)};
			if (!positionRow.hidden && position.value !== '') body.position = Number(position.value);
			const r = await api('POST', '/v1/runs', body);
			note.textContent = `run ${r.id} queued`;
			location.hash = `#/run/${r.id}`;
		} catch (e) {
			note.textContent = `not started: ${errorText(e)}`;
		}
	});
	halt.addEventListener('click', async () => {
		if (!(await confirmAction(`Halt ${name}?`,
			`The burette of ${name} stops at once and its current run is aborted.`,
			`Halt ${name}`)))
			return;
		try {
			const r = await api('POST', `/v1/stations/${encodeURIComponent(name)}/halt`);
			err.textContent = r.run ? `halted; run ${r.run} aborted` : 'halted';
		} catch (e) {
			err.textContent = `halt failed: ${errorText(e)}`;
		}
	});
	resume.addEventListener('click', async () => {
		if (!(await confirmAction(`Resume ${name}?`,
			`Nothing moves on ${name} until you resume it. Check the beaker first; its queued runs then start in order.`,
			`Resume ${name}`)))
			return;
		try {
			await api('POST', `/v1/stations/${encodeURIComponent(name)}/resume`);
		} catch (e) {
			err.textContent = `resume failed: ${errorText(e)}`;
		}
	});
	const el = h('section', {class: 'station card', 'data-station': name,
		'aria-label': `station ${name}`},
	h('header', {}, h('h2', {}, name), state, phase, halt), held, series,
	h('div', {class: 'readings'}, ph.el, mv.el, temp.el, age.el),
	h('div', {class: 'burette'}, h('span', {class: 'label'}, 'burette'), bar, bur),
	changer,
	h('p', {class: 'current'}, 'Current run: ', run, ' · queued: ', queued),
	err, form);
	const update = (st) => {
		state.textContent = st.state;
		state.className = `badge state-${st.state}`;
		phase.textContent = st.phase ? st.phase : '';
		const r = st.reading;
		ph.v.textContent = r ? fmt(r.ph, 2) : '—';
		mv.v.textContent = r ? fmt(r.mv, 1) : '—';
		temp.v.textContent = r ? fmt(r.temperature_c, 1) : '—';
		age.v.textContent = r && Number.isFinite(r.age_s) ? `${r.age_s.toFixed(1)} s` : 'no reading';
		age.v.classList.toggle('stale', !r || r.age_s > STALE_S);
		const b = st.burette || {};
		const cap = b.capacity_ml;
		bar.max = cap || 1;
		bar.value = Math.min(b.dispensed_ml || 0, cap || 1);
		bur.textContent = `${fmt(b.dispensed_ml, 3)} mL dispensed` +
			(cap ? ` of ${fmt(cap, 1)} mL` : '') +
			(Number.isFinite(b.contents_ml) ? ` · ${fmt(b.contents_ml, 3)} mL in the syringe` : '');
		run.replaceChildren(st.run ? h('a', {href: `#/run/${st.run}`}, `run ${st.run}`) : 'none');
		queued.textContent = String(st.queued || 0);
		if (st.error) err.textContent = st.error;
		halt.disabled = st.state === 'offline';
		held.hidden = !st.held;
		heldWhy.textContent = st.held_reason || '';
		const c = st.changer;
		changer.hidden = !c;
		positionRow.hidden = !c;
		if (c) {
			chgText.textContent = Number.isFinite(c.position)
				? `position ${c.position} · head ${c.lift}${c.moving ? ' · moving' : ''}`
				: 'not answering';
		}
		const s = st.series;
		series.hidden = !s;
		seriesId = s ? s.id : 0;
		seriesLink.replaceChildren(s ? h('a', {href: `#/series/${s.id}`}, String(s.id)) : '');
		seriesPrompt.textContent = s ? (s.prompt ? `waits: ${s.prompt}` : s.state) : '';
		next.hidden = !(s && s.prompt);
	};
	return {el, update, setMethods};
}

export function stationsView(root) {
	const cards = new Map();
	let methods = [];
	let n = 0;
	const grid = h('div', {class: 'stations'});
	const msg = h('p', {class: 'view-error', role: 'alert'});
	root.append(h('h1', {}, 'Stations'), msg, grid);
	return {
		every_ms: 1000,
		async refresh() {
			if (n++ % 15 === 0)
				methods = (await get('/v1/methods').catch(() => ({methods}))).methods || [];
			let data;
			try {
				data = await get('/v1/stations');
				msg.textContent = '';
			} catch (e) {
				msg.textContent = `stations not read: ${errorText(e)}`;
				return;
			}
			for (const st of data.stations) {
				let c = cards.get(st.name);
				if (!c) {
					c = card(st.name, methods);
					cards.set(st.name, c);
					grid.append(c.el);
				} else if (n % 15 === 1) {
					c.setMethods(methods);
				}
				c.update(st);
			}
		},
	};
}
