// series.js: series of samples (docs/api.md, "Series"): the list with a
// form that starts one (a work list uploaded as CSV or built by hand), and
// one series with each sample's runs and replicate statistics. The station
// card shows what a going series asks of the operator.
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

// ---- the work list: the CSV that `stopcock series start` reads ----
// The same rules as daemon/cli/cmd_series.c (docs/cli.md, "series"), so a
// file the page takes the CLI takes too: RFC 4180 fields, a header row of
// sample_id, method, amount, position and factor:NAME, every error as
// ROW:COLUMN: message (row 1 is the header, columns count from 1).
const WL_MAX_COLUMNS = 32;
const WL_MAX_ROWS = 200; // the most samples a series takes (docs/api.md)
const WL_MAX_FIELD_BYTES = 511;
const WL_MAX_POSITION = 999;
const ID_RE = /^[a-z0-9-]{1,63}$/; // daemon/lib/names.c, name_is_id(s, 64)
const DECIMAL_RE = /^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$/; // daemon/lib/numparse.c

function decimal(s) {
	if (!DECIMAL_RE.test(s)) return null;
	const v = Number(s);
	return Number.isFinite(v) ? v : null;
}

// One CSV record of text from index at.i (moved past it): {fields} or
// {error, col}; null at the end of the text.
function csvRecord(text, at) {
	if (at.i >= text.length) return null;
	const fields = [];
	const utf8 = new TextEncoder();
	for (;;) {
		let buf = '';
		let quoted = text[at.i] === '"';
		if (quoted) at.i++;
		for (;;) {
			if (at.i >= text.length) {
				if (quoted) return {error: 'a quoted field is not closed', col: fields.length + 1};
				break;
			}
			let ch = text[at.i];
			if (quoted && ch === '"') {
				if (text[at.i + 1] === '"') {
					at.i += 2;
				} else {
					at.i++;
					quoted = false;
					continue;
				}
			} else if (!quoted && (ch === ',' || ch === '\n' || ch === '\r')) {
				break;
			} else {
				at.i++;
			}
			buf += ch;
		}
		if (utf8.encode(buf).length > WL_MAX_FIELD_BYTES)
			return {error: 'the field is longer than 511 bytes', col: fields.length + 1};
		if (fields.length >= WL_MAX_COLUMNS) return {error: 'more than 32 columns', col: fields.length + 1};
		fields.push(buf);
		if (text[at.i] === ',') {
			at.i++;
			continue;
		}
		if (text[at.i] === '\r') at.i++;
		if (text[at.i] === '\n') at.i++;
		return {fields};
	}
}

// One cell of a sample: the message of its error, or null, with the value
// to send in out[key].
function checkCell(key, v, out) {
	if (key === 'sample_id') {
		out.sample_id = v;
		return v ? null : 'sample_id is empty';
	}
	if (key === 'method') {
		out.method = v;
		return ID_RE.test(v) ? null : `method '${v}' is not a method id ([a-z0-9-])`;
	}
	if (key === 'amount') {
		if (v === 'weigh') { // the station's balance weighs each beaker (the daemon checks it has one)
			out.amount = 'weigh';
			return null;
		}
		const a = decimal(v);
		if (a === null || !(a > 0)) return `amount must be a number above 0, not '${v}'`;
		out.amount = a;
		return null;
	}
	if (key === 'position') {
		const pos = [];
		for (const tok of v.split(/[ ;]+/).filter((x) => x)) {
			const p = /^[+-]?\d+$/.test(tok) ? Number(tok) : NaN;
			if (!(p >= 1 && p <= WL_MAX_POSITION))
				return `position '${tok}' is not a whole number 1 to ${WL_MAX_POSITION}`;
			pos.push(p);
		}
		if (pos.length) out.position = pos;
		return null;
	}
	// factor:NAME; an empty cell gives no factor
	if (!v) return null;
	const x = decimal(v);
	if (x === null) return `${key} must be a number, not '${v}'`;
	out.factors = out.factors || {};
	out.factors[key.slice(7)] = x;
	return null;
}

// The work list's text as the samples[] of POST /v1/series, and its errors
// [{row, col, message}] (no samples while any remains).
export function parseWorkList(text) {
	const errors = [];
	const err = (row, col, message) => errors.push({row, col, message});
	const at = {i: text.startsWith('\uFEFF') ? 1 : 0}; // a spreadsheet's byte order mark
	let row = 1;
	const head = csvRecord(text, at);
	if (!head) {
		err(1, 1, 'the work list is empty: it needs a header row (sample_id,method,amount,position) and one row per sample');
		return {samples: [], errors};
	}
	if (head.error) {
		err(1, head.col, head.error);
		return {samples: [], errors};
	}
	const cols = head.fields;
	const known = ['sample_id', 'method', 'amount', 'position'];
	cols.forEach((c, i) => {
		if (known.includes(c)) {
			if (cols.indexOf(c) !== i) err(1, i + 1, `column '${c}' is given twice`);
		} else if (!(c.startsWith('factor:') && ID_RE.test(c.slice(7)))) {
			err(1, i + 1, `unknown column '${c}' (columns: sample_id, method, amount, position, factor:NAME)`);
		}
	});
	for (const need of ['sample_id', 'method', 'amount'])
		if (!cols.includes(need)) err(1, 1, `the header has no column ${need}`);
	const samples = [];
	for (let rec; (rec = csvRecord(text, at));) {
		row++;
		if (rec.error) {
			err(row, rec.col, rec.error);
			break;
		}
		const f = rec.fields;
		if (f.length === 1 && f[0] === '') continue;
		if (f.length !== cols.length) {
			err(row, Math.min(f.length, cols.length) + 1, `the row has ${f.length} fields, the header ${cols.length}`);
			continue;
		}
		if (samples.length >= WL_MAX_ROWS) {
			err(row, 1, `a series takes at most ${WL_MAX_ROWS} samples`);
			break;
		}
		const s = {};
		f.forEach((v, i) => {
			const key = cols[i];
			// a repeated or unknown column is reported on the header
			if ((known.includes(key) && cols.indexOf(key) !== i) ||
				(!known.includes(key) && !key.startsWith('factor:')))
				return;
			const m = checkCell(key, v, s);
			if (m) err(row, i + 1, m);
		});
		samples.push(s);
	}
	if (!samples.length && !errors.length) err(row + 1, 1, 'the work list has a header but no sample');
	return errors.length ? {samples: [], errors} : {samples, errors};
}

// The sample unit of a method (`sample: {unit: mL}` or a `unit:` line under
// `sample:`) from its YAML text; '' when the text does not say.
export function sampleUnit(text) {
	const lines = text.split('\n');
	for (let i = 0; i < lines.length; i++) {
		const m = /^sample:(.*)$/.exec(lines[i]);
		if (!m) continue;
		const flow = /\bunit:\s*["']?([A-Za-z]+)/.exec(m[1]);
		if (flow) return flow[1];
		for (let j = i + 1; j < lines.length && (/^\s/.test(lines[j]) || !lines[j].trim()); j++) {
			const u = /^\s+unit:\s*["']?([A-Za-z]+)/.exec(lines[j]);
			if (u) return u[1];
		}
		return '';
	}
	return '';
}

// Why the daemon refused a series, in words, then its own message.
function refusalText(e) {
	const why = {
		400: 'the daemon refused the work list',
		401: 'the token was refused',
		403: 'this token may not start a series',
		404: 'a station or method is unknown',
		409: 'the station cannot take it now',
		422: 'a method does not parse',
	}[e.status];
	return why ? `${why}: ${e.message}` : errorText(e);
}

// The form that starts a series: station, on_failure, the samples from an
// uploaded CSV or a table built by hand, their preview, then POST /v1/series.
function startForm() {
	const units = new Map(); // method id -> sample unit ('' unknown), read once each
	let methods = [];
	const station = h('select', {id: 'wl-station', name: 'station', required: true});
	const onFailure = h('select', {id: 'wl-on-failure', name: 'on_failure'},
		h('option', {value: 'stop'}, 'stop the series'),
		h('option', {value: 'continue'}, 'go on with the next sample'));
	const srcFile = h('input', {type: 'radio', name: 'wl-source', id: 'wl-src-file', value: 'file', checked: true});
	const srcHand = h('input', {type: 'radio', name: 'wl-source', id: 'wl-src-hand', value: 'hand'});
	const file = h('input', {type: 'file', id: 'wl-file', accept: '.csv,text/csv'});
	const fileBox = h('div', {class: 'wl-file'}, h('label', {for: file.id}, 'Work list (CSV)'), file,
		h('p', {class: 'hint'}, 'A header row of sample_id, method, amount, and optionally position ',
			'(one rack position per replicate, like 1;2) and factor:NAME columns, as for ',
			h('code', {}, 'stopcock series start'), '.'));
	const handBody = h('tbody');
	const addRow = h('button', {type: 'button'}, 'Add a sample');
	const handBox = h('div', {class: 'wl-hand', hidden: true},
		h('table', {class: 'wl-table'}, h('thead', {}, h('tr', {}, h('th', {}, 'sample id'),
			h('th', {}, 'method'), h('th', {}, 'amount'), h('th', {}, 'positions'), h('th', {}))),
		handBody), addRow);
	const errorList = h('ul', {class: 'wl-errors', role: 'alert'});
	const previewBody = h('tbody');
	const preview = h('div', {class: 'wl-preview', hidden: true}, h('h3', {}, 'Preview'),
		h('table', {class: 'result-table'}, h('thead', {}, h('tr', {}, h('th', {}, '#'),
			h('th', {}, 'sample'), h('th', {}, 'method'), h('th', {}, 'amount'),
			h('th', {}, 'positions'), h('th', {}, 'factors'))), previewBody));
	const start = h('button', {type: 'submit', class: 'primary', disabled: true}, 'Start series');
	const note = h('p', {class: 'form-note', role: 'status'});
	const form = h('form', {class: 'card series-start', 'aria-label': 'start a series', 'data-needs': 'operate'},
		h('h2', {}, 'Start a series'),
		h('div', {class: 'wl-grid'},
			h('label', {for: station.id}, 'Station'), station,
			h('label', {for: onFailure.id}, 'After a failed sample'), onFailure),
		h('fieldset', {class: 'wl-source'}, h('legend', {}, 'Samples'),
			h('label', {}, srcFile, ' upload a CSV work list'), ' ',
			h('label', {}, srcHand, ' build the list here')),
		fileBox, handBox, errorList, preview, h('p', {}, start), note);

	let fileName = 'work list';
	let fileResult = {samples: [], errors: []};
	let current = {samples: [], errors: []};

	const methodSelect = (value) => {
		const sel = h('select', {name: 'method', 'aria-label': 'method'},
			...methods.map((m) => h('option', {value: m.id}, m.id)));
		if (value) sel.value = value;
		return sel;
	};
	const unitOf = async (id) => {
		if (!ID_RE.test(id)) return '';
		if (!units.has(id)) {
			units.set(id, '');
			try {
				units.set(id, sampleUnit((await get(`/v1/methods/${id}`)).text || ''));
			} catch {
				units.delete(id); // asked again on the next change
			}
		}
		return units.get(id);
	};
	const handRow = () => {
		const unit = h('span', {class: 'unit'});
		const method = methodSelect(methods.length ? methods[0].id : '');
		const showUnit = async () => {
			unit.textContent = await unitOf(method.value);
		};
		method.addEventListener('change', showUnit);
		const remove = h('button', {type: 'button', class: 'quiet'}, 'Remove');
		const tr = h('tr', {},
			h('td', {}, h('input', {name: 'sample_id', 'aria-label': 'sample id', autocomplete: 'off'})),
			h('td', {}, method),
			h('td', {}, h('input', {name: 'amount', 'aria-label': 'amount', inputmode: 'decimal', size: 7}), ' ', unit),
			h('td', {}, h('input', {name: 'position', 'aria-label': 'positions', placeholder: 'e.g. 1;2', size: 8})),
			h('td', {}, remove));
		remove.addEventListener('click', () => {
			tr.remove();
			update();
		});
		showUnit();
		return tr;
	};
	// The hand-built rows through the same checks as a CSV's cells.
	const handResult = () => {
		const samples = [];
		const errors = [];
		[...handBody.rows].forEach((tr, n) => {
			const s = {};
			['sample_id', 'method', 'amount', 'position'].forEach((key, i) => {
				const m = checkCell(key, tr.querySelector(`[name="${key}"]`).value.trim(), s);
				if (m) errors.push({row: n + 1, col: i + 1, message: m});
			});
			samples.push(s);
		});
		if (!samples.length) errors.push({row: 1, col: 1, message: 'add at least one sample'});
		return errors.length ? {samples: [], errors} : {samples, errors};
	};
	const update = async () => {
		const hand = srcHand.checked;
		fileBox.hidden = hand;
		handBox.hidden = !hand;
		current = hand ? handResult() : fileResult;
		errorList.replaceChildren(...current.errors.map((e) => h('li', {},
			hand ? `sample ${e.row}, column ${e.col}: ${e.message}` : `${fileName}:${e.row}:${e.col}: ${e.message}`)));
		start.disabled = !current.samples.length || current.errors.length > 0;
		preview.hidden = !current.samples.length;
		const shown = current;
		const rows = [];
		for (const [i, s] of shown.samples.entries()) {
			const unit = await unitOf(s.method);
			rows.push(h('tr', {}, h('td', {}, String(i + 1)), h('td', {}, s.sample_id),
				h('td', {}, s.method), h('td', {class: 'wl-amount'}, s.amount === 'weigh' ? 'weigh' : `${s.amount}${unit ? ` ${unit}` : ''}`),
				h('td', {}, s.position ? s.position.join(' ') : 'as the method says'),
				h('td', {}, s.factors ? Object.entries(s.factors).map(([k, v]) => `${k} ${v}`).join(', ') : '')));
		}
		if (shown === current) previewBody.replaceChildren(...rows);
	};
	srcFile.addEventListener('change', update);
	srcHand.addEventListener('change', () => {
		if (!handBody.rows.length) handBody.append(handRow());
		update();
	});
	handBox.addEventListener('input', update);
	handBox.addEventListener('change', update);
	addRow.addEventListener('click', () => {
		handBody.append(handRow());
		update();
	});
	file.addEventListener('change', async () => {
		const f = file.files[0];
		note.textContent = '';
		if (!f) {
			fileResult = {samples: [], errors: []};
		} else {
			fileName = f.name;
			fileResult = parseWorkList(await f.text());
		}
		update();
	});
	form.addEventListener('submit', async (ev) => {
		ev.preventDefault();
		// Checked again: nothing is sent while any error remains.
		if (srcHand.checked) current = handResult();
		if (!current.samples.length || current.errors.length) {
			note.textContent = 'not started: correct the work list first';
			return;
		}
		note.textContent = 'starting…';
		start.disabled = true;
		try {
			const r = await api('POST', '/v1/series', {station: station.value,
				on_failure: onFailure.value, samples: current.samples});
			note.textContent = `series ${r.id} queued`;
			location.hash = `#/series/${r.id}`;
		} catch (e) {
			note.textContent = `not started: ${refusalText(e)}`;
			start.disabled = false;
		}
	});
	return {
		form,
		// Stations and methods, read once (again while a read fails).
		async load() {
			if (station.options.length && methods.length) return;
			const [st, ms] = await Promise.all([get('/v1/stations'), get('/v1/methods')]);
			station.replaceChildren(...st.stations.map((s) => h('option', {value: s.name}, s.name)));
			methods = ms.methods || [];
			for (const sel of handBody.querySelectorAll('select[name="method"]')) {
				const keep = sel.value;
				sel.replaceChildren(...methods.map((m) => h('option', {value: m.id}, m.id)));
				if (methods.some((m) => m.id === keep)) sel.value = keep;
			}
		},
	};
}

export function seriesListView(root) {
	const body = h('tbody');
	const msg = h('p', {class: 'view-error', role: 'alert'});
	const starter = startForm();
	root.append(h('h1', {}, 'Series'), msg, starter.form,
		h('div', {class: 'card'}, h('table', {class: 'runs-table'},
			h('thead', {}, h('tr', {}, h('th', {}, 'series'), h('th', {}, 'station'),
				h('th', {}, 'state'), h('th', {}, 'samples'), h('th', {}, 'created'),
				h('th', {}, 'waits for'))), body)));
	return {
		every_ms: 3000,
		async refresh() {
			let data;
			try {
				await starter.load();
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
	const next = h('button', {type: 'button', class: 'primary', 'data-needs': 'operate'}, 'Beaker placed');
	const abort = h('button', {type: 'button', class: 'halt', 'data-needs': 'operate'}, 'Abort series');
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
