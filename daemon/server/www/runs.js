// runs.js: one run drawn live (curve, derivative, endpoints, results) and the
// filtered list of runs.
import {api, get, h, fmt, when, errorText, confirmAction, ApiError} from './api.js';
import {newChart, drawChart} from './chart.js';

const FINAL = new Set(['finished', 'aborted', 'failed', 'interrupted']);
const STATES = ['queued', 'running', 'finished', 'aborted', 'failed', 'interrupted'];

function acceptBadge(a) {
	const words = {pass: 'pass', low: 'low', high: 'high', none: 'no limits', missing: 'no value',
		doubtful: 'doubtful'};
	return h('span', {class: `badge accept-${a || 'none'}`}, words[a] || a || '—');
}

// Plain words for the engine's stop codes (docs/lims.md lists them); a code
// this page does not know is shown with spaces for underscores.
const STOP_WORDS = {
	endpoints_found: 'all endpoints found',
	volume_max: 'maximum volume reached',
	signal_limit: 'signal limit reached',
	time_max: 'time limit reached',
	fault: 'a device or data fault',
	aborted: 'aborted by an operator',
	interrupted: 'the daemon stopped during the run',
};

export function stopWords(code) {
	if (!code) return '—';
	return STOP_WORDS[code] || code.replaceAll('_', ' ');
}

// A volume with its standard uncertainty: u to two significant digits and
// the volume to the same decimal place (at least the burette's 0.001 mL).
export function withUncertainty(v, u) {
	if (!Number.isFinite(u) || u <= 0) return fmt(v, 3);
	const d = Math.min(6, Math.max(3, 1 - Math.floor(Math.log10(u))));
	return `${fmt(v, d)} ± ${fmt(u, d)}`;
}

// The outcome in a sentence, and whether it needs a person (docs/lims.md,
// "What finished means"): a failed run, or a finished one with a result
// outside its limits, is shown in the failure style with the reason.
export function outcomeOf(rec) {
	const res = rec.results || [];
	const fault = (rec.faults || [])[0];
	const why = fault ? fault.message : stopWords(rec.stop_reason);
	switch (rec.state) {
	case 'finished': {
		const doubtful = (rec.endpoints || []).filter((e) => e.doubt);
		if (doubtful.length)
			return {bad: true, text: 'Doubtful: ' + doubtful.map((e) =>
				`endpoint ${e.n}: ${e.doubt}`).join('; ')};
		const off = res.filter((r) => r.accept === 'low' || r.accept === 'high');
		if (off.length)
			return {bad: true, text: 'Out of limits: ' + off.map((r) =>
				`${r.name} ${resultText(r)} ${r.unit || ''} is ${r.accept === 'low' ? 'below' : 'above'} the method's limit`)
				.join('; ')};
		return {bad: false, text: res.some((r) => r.accept === 'pass')
			? 'Finished: every result within its limits' : 'Finished'};
	}
	case 'failed':
		return {bad: true, text: `Failed: ${why}`};
	case 'aborted':
		return {bad: true, text: `Aborted: ${why}`};
	case 'interrupted':
		return {bad: true, text: `Interrupted: ${why}`};
	default:
		return null;
	}
}

function resultText(res) {
	return res.value === null || res.value === undefined ? '—' : String(res.value);
}

function kv(label, value) {
	return [h('dt', {}, label), h('dd', {}, value)];
}

export function runView(root, id) {
	const title = h('h1', {}, `Run ${id}`);
	const state = h('span', {class: 'badge'}, '…');
	const msg = h('p', {class: 'view-error', role: 'alert'});
	const outcome = h('p', {class: 'outcome', hidden: true});
	const facts = h('dl', {class: 'facts'});
	const chart = newChart(`titration curve of run ${id}`);
	const signalWord = h('span', {}, 'pH');
	const legend = h('p', {class: 'legend'},
		h('span', {class: 'key curve'}), signalWord, ' ',
		h('span', {class: 'key deriv'}), 'first derivative ',
		h('span', {class: 'key endpoint'}), 'endpoint');
	const endpoints = h('div', {class: 'endpoints'});
	const results = h('div', {class: 'results'});
	const faults = h('div', {class: 'faults'});
	const abort = h('button', {type: 'button', class: 'danger', hidden: true, 'data-needs': 'operate'},
		'Abort run');
	// The second person's signature (docs/lims.md, "Review and corrections"):
	// shown to a token with the review role while the results wait for it.
	const reviewState = h('p', {class: 'review-state'});
	const reviewReason = h('input', {type: 'text', name: 'reason', maxlength: '500',
		placeholder: 'reason (needed to reject)', 'aria-label': 'reason of the review'});
	const approve = h('button', {type: 'button', class: 'approve'}, 'Approve');
	const reject = h('button', {type: 'button', class: 'reject danger'}, 'Reject');
	const reviewForm = h('div', {class: 'review-form', hidden: true, 'data-needs': 'review'},
		reviewReason, approve, reject);
	const review = h('div', {class: 'card review'}, h('h2', {}, 'Review'), reviewState, reviewForm);
	const sign = async (decision) => {
		try {
			await api('POST', `/v1/runs/${id}/review`, {decision, reason: reviewReason.value});
			reviewReason.value = '';
			await view.refresh();
		} catch (e) {
			msg.textContent = `${decision} failed: ${errorText(e)}`;
		}
	};
	approve.addEventListener('click', () => sign('approve'));
	reject.addEventListener('click', () => sign('reject'));
	const links = h('p', {class: 'links'},
		h('a', {href: `/v1/runs/${id}/points?format=csv`, download: `run-${id}.csv`}, 'points as CSV'),
		' · ',
		h('a', {href: `/v1/runs/${id}/curve.svg`, target: '_blank', rel: 'noopener'}, 'curve as SVG'),
		' · ',
		h('a', {href: `/v1/runs/${id}`, target: '_blank', rel: 'noopener'}, 'record as JSON'));
	root.append(h('div', {class: 'run-head'}, title, state, abort), msg, outcome,
		h('div', {class: 'run-grid'},
			h('div', {class: 'card chart-card'}, chart, legend),
			h('div', {class: 'card'}, facts)),
		h('div', {class: 'run-grid lower'},
			h('div', {class: 'card'}, h('h2', {}, 'Results'), results),
			h('div', {class: 'card'}, h('h2', {}, 'Endpoints'), endpoints, faults)),
		review, links);
	abort.addEventListener('click', async () => {
		if (!(await confirmAction(`Abort run ${id}?`,
			'The burette stops at once and the run ends as aborted.', 'Abort run')))
			return;
		try {
			await api('POST', `/v1/runs/${id}/abort`);
		} catch (e) {
			msg.textContent = `abort failed: ${errorText(e)}`;
		}
	});
	let final = false;
	let signal = 'ph';
	const view = {
		every_ms: 1000,
		async refresh() {
			let rec, pts;
			try {
				rec = await get(`/v1/runs/${id}`);
				pts = await get(`/v1/runs/${id}/points`);
				msg.textContent = '';
			} catch (e) {
				msg.textContent = e instanceof ApiError && e.status === 404
					? `There is no run ${id}.` : `run not read: ${errorText(e)}`;
				return;
			}
			// The signal of the curve: mV when no point has a pH.
			const points = pts.points || [];
			signal = points.length && points.every((p) => p.ph === null) ? 'mv' : 'ph';
			signalWord.textContent = signal === 'mv' ? 'potential' : 'pH';
			state.textContent = rec.state + (rec.phase ? ` · ${rec.phase}` : '');
			const o = outcomeOf(rec);
			// A finished run with a result out of its limits is not green.
			state.className = `badge state-${o && o.bad && rec.state === 'finished' ? 'failed' : rec.state}`;
			outcome.hidden = !o;
			outcome.textContent = o ? o.text : '';
			outcome.className = `outcome ${o && o.bad ? 'bad' : 'good'}`;
			abort.hidden = FINAL.has(rec.state);
			const m = rec.method || {};
			const smp = rec.sample || {};
			title.textContent = `Run ${id}: ${m.id || '?'} on ${rec.station || '?'}`;
			facts.replaceChildren(
				...kv('sample', `${smp.id || '?'}, ${fmt(smp.amount, 3)} ${smp.unit || ''}`),
				...kv('method', `${m.id || '?'} revision ${m.revision ?? '?'}`),
				...kv('phase', rec.phase || (FINAL.has(rec.state) ? 'ended' : '—')),
				...kv('additions', String(rec.additions ?? 0)),
				...kv('dispensed', `${fmt(rec.dispensed_ml, 3)} mL`),
				...kv('points', String(points.length)),
				...kv('queued', when(rec.queued_at)),
				...kv('started', when(rec.started_at)),
				...kv('ended', when(rec.ended_at)),
				...kv('stop reason', stopWords(rec.stop_reason)),
				...kv('titrant', rec.titrant ? rec.titrant.name : '—'),
				...kv('concentration', rec.titrant ? `${fmt(rec.titrant.molarity, 4)} mol/L`
					+ ` × titer ${fmt(rec.titrant.titer, 4)}` : '—'),
				...kv('calibration', rec.calibration ? `slope ${fmt(rec.calibration.slope_pct, 1)} %,`
					+ ` offset ${fmt(rec.calibration.offset_mv, 1)} mV` : 'none (mV signal)'));
			drawChart(chart, points, rec.endpoints || [], signal);
			const eps = rec.endpoints || [];
			endpoints.replaceChildren(eps.length
				? h('table', {class: 'endpoint-table'},
					h('thead', {}, h('tr', {}, h('th', {}, '#'), h('th', {}, 'volume, mL'),
						h('th', {}, 'pH'), h('th', {}, 'mV'), h('th', {}, 'how'))),
					h('tbody', {}, eps.map((e) => h('tr', {},
						h('td', {}, `E${e.n}`),
						h('td', {}, withUncertainty(e.volume_ml, e.u_volume_ml)),
						h('td', {}, fmt(e.ph, 2)), h('td', {}, fmt(e.mv, 1)),
						h('td', {}, (e.how || '') + (e.fallback
							? ` (fallback of criterion ${e.criterion}: no inflection)` : ''),
							e.doubt ? h('span', {class: 'badge accept-doubtful',
								title: e.doubt}, 'doubtful') : ''),
						e.doubt ? h('td', {class: 'doubt'}, e.doubt) : ''))))
				: h('p', {class: 'muted'}, FINAL.has(rec.state) ? 'No endpoint found.'
					: 'No endpoint yet.'));
			const res = rec.results || [];
			results.replaceChildren(res.length
				? h('table', {class: 'result-table'},
					h('thead', {}, h('tr', {}, h('th', {}, 'result'), h('th', {}, 'value'),
						h('th', {}, 'accept'))),
					h('tbody', {}, res.map((x) => h('tr', {'data-result': x.name},
						h('td', {}, x.name),
						h('td', {class: 'num'}, `${resultText(x)} ${x.unit || ''}`
							+ (x.fallback ? ' (from a fallback endpoint)' : '')),
						h('td', {}, acceptBadge(x.accept))))))
				: h('p', {class: 'muted'}, FINAL.has(rec.state) ? 'No results.'
					: 'Results appear when the run ends.'));
			const fl = rec.faults || [];
			faults.replaceChildren(...(fl.length ? [h('h3', {}, 'Faults'),
				h('ul', {}, fl.map((f) => h('li', {}, `${when(f.at)}: ${f.code}: ${f.message}`)))]
				: []));
			const rv = rec.review;
			review.hidden = !rv;
			if (rv)
				reviewState.textContent = `version ${rec.version ?? 1}: ${rv.state}`
					+ (rv.by ? ` by ${rv.by}, ${when(rv.at)}` : '')
					+ (rv.reason ? `: ${rv.reason}` : '');
			reviewForm.hidden = !rv || rv.state !== 'pending';
			// A final run changes no more: poll slowly, in case of a restart.
			final = FINAL.has(rec.state);
			view.every_ms = final ? 10000 : 1000;
		},
	};
	return view;
}

function glance(results) {
	return (results || []).map((x) => x.value === null || x.value === undefined
		? h('span', {class: 'glance muted'}, `${x.name}: no value `)
		: h('span', {class: 'glance'}, `${x.name} ${resultText(x)} ${x.unit || ''} `,
			acceptBadge(x.accept)));
}

export function runsView(root) {
	const station = h('select', {id: 'f-station', name: 'station'}, h('option', {value: ''}, 'all'));
	const state = h('select', {id: 'f-state', name: 'state'}, h('option', {value: ''}, 'all'),
		STATES.map((s) => h('option', {value: s}, s)));
	const since = h('input', {id: 'f-since', name: 'since', type: 'date'});
	const msg = h('p', {class: 'view-error', role: 'alert'});
	const body = h('tbody');
	const count = h('p', {class: 'muted', role: 'status'});
	const form = h('form', {class: 'filters', 'aria-label': 'filter runs'},
		h('label', {for: 'f-station'}, 'Station'), station,
		h('label', {for: 'f-state'}, 'State'), state,
		h('label', {for: 'f-since'}, 'Since'), since,
		h('button', {type: 'submit'}, 'Filter'));
	root.append(h('h1', {}, 'Runs'), form, msg,
		h('div', {class: 'card'}, h('table', {class: 'runs-table'},
			h('thead', {}, h('tr', {}, ['run', 'station', 'method', 'sample', 'state', 'started',
				'results'].map((c) => h('th', {scope: 'col'}, c)))), body), count));
	let stationsKnown = false;
	const view = {
		every_ms: 3000,
		async refresh() {
			if (!stationsKnown) {
				try {
					const st = await get('/v1/stations');
					station.append(...st.stations.map((s) => h('option', {value: s.name}, s.name)));
					stationsKnown = true;
				} catch (e) {
					msg.textContent = `stations not read: ${errorText(e)}`;
				}
			}
			const q = new URLSearchParams();
			if (station.value) q.set('station', station.value);
			if (state.value) q.set('state', state.value);
			// The date picker gives a local date; the daemon compares UTC times.
			if (since.value) q.set('since', new Date(`${since.value}T00:00`).toISOString());
			q.set('limit', '200');
			let data;
			try {
				data = await get(`/v1/runs?${q}`);
				msg.textContent = '';
			} catch (e) {
				msg.textContent = `runs not read: ${errorText(e)}`;
				return;
			}
			body.replaceChildren(...data.runs.map((r) => h('tr', {'data-run': r.id},
				h('td', {}, h('a', {href: `#/run/${r.id}`}, `run ${r.id}`)),
				h('td', {}, r.station || ''),
				h('td', {}, r.method ? `${r.method.id} r${r.method.revision}` : ''),
				h('td', {}, r.sample ? `${r.sample.id} (${r.sample.amount} ${r.sample.unit})` : ''),
				h('td', {}, h('span', {class: `badge state-${r.state}`},
					r.state + (r.phase ? ` · ${r.phase}` : ''))),
				h('td', {}, when(r.started_at)),
				h('td', {}, glance(r.results)))));
			count.textContent = `${data.runs.length} run${data.runs.length === 1 ? '' : 's'}` +
				(data.runs.length >= 200 ? ' (the newest 200)' : '');
		},
	};
	form.addEventListener('submit', (ev) => {
		ev.preventDefault();
		view.refresh();
	});
	for (const el of [station, state, since]) el.addEventListener('change', () => view.refresh());
	return view;
}
