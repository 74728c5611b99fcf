// calib.js: electrode calibration, buffer by buffer: put the electrode in
// buffer X, measure, next; then slope and offset with the verdict.
import {api, get, h, fmt, when, errorText} from './api.js';

const FINAL = new Set(['accepted', 'rejected']);

function verdict(cal) {
	if (!cal) return h('p', {class: 'muted'}, 'No calibration yet.');
	const ok = cal.state === 'accepted';
	return h('div', {class: `verdict ${FINAL.has(cal.state) ? (ok ? 'good' : 'bad') : ''}`,
		'data-state': cal.state},
	h('p', {class: 'verdict-word'}, cal.state),
	h('dl', {class: 'facts'},
		h('dt', {}, 'slope'), h('dd', {}, `${fmt(cal.slope_pct, 2)} %`),
		h('dt', {}, 'offset at pH 7'), h('dd', {}, `${fmt(cal.offset_mv, 2)} mV`),
		h('dt', {}, 'temperature'), h('dd', {}, `${fmt(cal.temperature_c, 1)} °C`),
		h('dt', {}, 'measured'), h('dd', {}, when(cal.at)),
		h('dt', {}, 'valid until'), h('dd', {}, when(cal.expires_at))),
	cal.reason ? h('p', {class: 'reason'}, cal.reason) : null);
}

export function calibrationView(root, id) {
	const msg = h('p', {class: 'view-error', role: 'alert'});
	root.append(h('h1', {}, id ? `Calibration ${id}` : 'Electrode calibration'), msg);
	return id ? flow(root, msg, id) : start(root, msg);
}

function start(root, msg) {
	const station = h('select', {id: 'cal-station', name: 'station'});
	const buffers = h('input', {id: 'cal-buffers', name: 'buffers', value: '4.01, 7.00, 10.01',
		inputmode: 'decimal', autocomplete: 'off', 'aria-describedby': 'cal-buffers-hint'});
	const note = h('p', {class: 'form-note', role: 'status'});
	const latest = h('div', {class: 'latest'});
	const form = h('form', {class: 'card start cal-start', 'aria-label': 'start a calibration',
		'data-needs': 'operate'},
		h('h2', {}, 'New calibration'),
		h('label', {for: 'cal-station'}, 'Station'), station,
		h('label', {for: 'cal-buffers'}, 'Buffers (pH at 25 °C)'),
		buffers,
		h('p', {class: 'hint muted', id: 'cal-buffers-hint'},
			'In the order you will use them; 2 to 5 buffers at least 1 pH apart.'),
		h('button', {type: 'submit', class: 'primary'}, 'Begin'), note);
	root.append(h('div', {class: 'run-grid'}, form,
		h('div', {class: 'card'}, h('h2', {}, 'Latest calibration of the station'), latest)));
	form.addEventListener('submit', async (ev) => {
		ev.preventDefault();
		const list = buffers.value.split(/[\s,;]+/).filter(Boolean).map(Number);
		if (list.some((x) => !Number.isFinite(x))) {
			note.textContent = 'buffers are numbers, e.g. 4.01, 7.00, 10.01';
			return;
		}
		try {
			const r = await api('POST', '/v1/calibrations', {station: station.value, buffers: list});
			location.hash = `#/calibration/${r.id}`;
		} catch (e) {
			note.textContent = `not started: ${errorText(e)}`;
		}
	});
	let known = false;
	return {
		every_ms: 5000,
		async refresh() {
			if (!known) {
				const st = await get('/v1/stations');
				station.replaceChildren(...st.stations.map((s) =>
					h('option', {value: s.name}, s.name)));
				station.addEventListener('change', () => this.refresh());
				known = true;
			}
			if (!station.value) return;
			try {
				const cal = await get(`/v1/calibrations/latest?station=${encodeURIComponent(station.value)}`);
				latest.replaceChildren(verdict(cal),
					h('a', {href: `#/calibration/${cal.id}`}, `calibration ${cal.id}`));
			} catch (e) {
				latest.replaceChildren(e.status === 404 ? verdict(null)
					: h('p', {class: 'view-error'}, errorText(e)));
			}
		},
	};
}

function flow(root, msg, id) {
	const steps = h('ol', {class: 'steps'});
	const prompt = h('div', {class: 'prompt', role: 'status', 'aria-live': 'polite'});
	const live = h('p', {class: 'live'});
	const measure = h('button', {type: 'button', class: 'primary big-button', hidden: true,
		'data-needs': 'operate'},
		'Measure');
	const result = h('div', {class: 'card result-card'});
	root.append(h('div', {class: 'run-grid'},
		h('div', {class: 'card'}, h('h2', {}, 'Buffers'), steps),
		h('div', {class: 'card'}, prompt, live, measure)), result);
	let cal = null;
	measure.addEventListener('click', async () => {
		measure.disabled = true;
		try {
			cal = await api('POST', `/v1/calibrations/${id}/next`, {});
			show();
		} catch (e) {
			msg.textContent = `not measured: ${errorText(e)}`;
		} finally {
			measure.disabled = false;
		}
	});
	const show = () => {
		const bufs = cal.buffers || [];
		const nextIdx = bufs.findIndex((b) => b.mv === null || b.mv === undefined);
		steps.replaceChildren(...bufs.map((b, i) => {
			const done = b.mv !== null && b.mv !== undefined;
			const cur = i === nextIdx && !FINAL.has(cal.state);
			return h('li', {class: done ? 'done' : cur ? 'current' : 'todo', 'data-buffer': b.nominal},
				h('span', {class: 'buf'}, `pH ${fmt(b.nominal, 2)}`),
				h('span', {class: 'buf-name'}, b.name || ''),
				h('span', {class: 'buf-mv'}, done ? `${fmt(b.mv, 1)} mV at ${fmt(b.temperature_c, 1)} °C`
					+ (Number.isFinite(b.ph) ? ` (buffer pH ${fmt(b.ph, 2)} there)` : '')
					: cur ? (cal.state === 'measuring' ? 'measuring…' : 'next') : ''));
		}));
		const nb = fmt(cal.next_buffer, 2);
		if (cal.state === 'waiting') {
			prompt.replaceChildren(h('p', {class: 'prompt-big'}, `Put the electrode in buffer pH ${nb}`),
				h('p', {}, 'Rinse it with deionised water, blot it, immerse it in the stirred ' +
					'buffer, then press Measure.'));
			measure.textContent = `Measure buffer ${nb}`;
			measure.hidden = false;
		} else if (cal.state === 'measuring') {
			prompt.replaceChildren(h('p', {class: 'prompt-big'}, 'Measuring…'),
				h('p', {}, 'Leave the electrode still until the reading is stable.'));
			measure.hidden = true;
		} else {
			prompt.replaceChildren(h('p', {class: 'prompt-big'}, `Calibration ${cal.state}`),
				h('p', {}, cal.state === 'accepted'
					? 'Runs with signal: ph on this station use it until it expires.'
					: 'This calibration is kept for inspection but never used.'),
				h('p', {}, h('a', {href: '#/calibration'}, 'Start another calibration')));
			measure.hidden = true;
		}
		result.replaceChildren(h('h2', {}, 'Slope and offset'),
			FINAL.has(cal.state) ? verdict(cal) : h('p', {class: 'muted'},
				'Shown when every buffer has been measured.'));
	};
	const view = {
		every_ms: 1000,
		async refresh() {
			try {
				cal = await get(`/v1/calibrations/${id}`);
				msg.textContent = '';
			} catch (e) {
				msg.textContent = `calibration not read: ${errorText(e)}`;
				return;
			}
			show();
			if (!FINAL.has(cal.state)) {
				const st = (await get('/v1/stations')).stations.find((s) => s.name === cal.station);
				const r = st && st.reading;
				live.textContent = r ? `electrode now: ${fmt(r.mv, 1)} mV, ${fmt(r.temperature_c, 1)} °C`
					+ ` (reading ${fmt(r.age_s, 1)} s old)` : 'no reading from the electrode';
			} else {
				live.textContent = '';
			}
			view.every_ms = FINAL.has(cal.state) ? 10000 : 1000;
		},
	};
	return view;
}
