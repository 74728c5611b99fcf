// methods.js: the method list, one method's YAML, and the editor that checks
// the text through POST /v1/methods/{id}/check and shows each
// file:line:col error beside its line.
import {api, get, getToken, h, when, errorText, ApiError} from './api.js';

const CHECK_DELAY_MS = 700; // after the last keystroke

export function methodsView(root) {
	const body = h('tbody');
	const msg = h('p', {class: 'view-error', role: 'alert'});
	const newId = h('input', {id: 'new-method', name: 'id', pattern: '[a-z0-9-]+', required: true,
		autocomplete: 'off', placeholder: 'e.g. orchard-malic'});
	const create = h('form', {class: 'filters', 'aria-label': 'new method', 'data-needs': 'admin'},
		h('label', {for: 'new-method'}, 'New method id'), newId,
		h('button', {type: 'submit'}, 'Write it'));
	create.addEventListener('submit', (ev) => {
		ev.preventDefault();
		location.hash = `#/method/${newId.value}/edit`;
	});
	root.append(h('h1', {}, 'Methods'), msg,
		h('div', {class: 'card'}, h('table', {class: 'methods-table'},
			h('thead', {}, h('tr', {}, h('th', {scope: 'col'}, 'method'),
				h('th', {scope: 'col', class: 'num'}, 'revision'),
				h('th', {scope: 'col', class: 'num'}, 'revisions kept'),
				h('th', {scope: 'col'}, 'sha256'))), body)), create);
	return {
		every_ms: 15000,
		async refresh() {
			let data;
			try {
				data = await get('/v1/methods');
				msg.textContent = '';
			} catch (e) {
				msg.textContent = `methods not read: ${errorText(e)}`;
				return;
			}
			body.replaceChildren(...data.methods.map((m) => h('tr', {'data-method': m.id},
				h('td', {}, h('a', {href: `#/method/${encodeURIComponent(m.id)}`}, m.id)),
				h('td', {class: 'num'}, String(m.revision)),
				h('td', {class: 'num'}, String(m.revisions_stored)),
				h('td', {class: 'mono'}, (m.sha256 || '').slice(0, 16) + '…'))));
		},
	};
}

function numbered(text) {
	const lines = text.replace(/\n$/, '').split('\n');
	return h('ol', {class: 'yaml'}, lines.map((l) => h('li', {}, h('code', {}, l || ' '))));
}

export function methodView(root, id) {
	const msg = h('p', {class: 'view-error', role: 'alert'});
	const head = h('h1', {}, `Method ${id}`);
	const facts = h('p', {class: 'muted'});
	const text = h('div', {class: 'card yaml-card'});
	const edit = h('a', {href: `#/method/${encodeURIComponent(id)}/edit`, class: 'button primary'},
		'Edit');
	root.append(h('div', {class: 'run-head'}, head, edit), facts, msg, text);
	let shown = false;
	return {
		every_ms: 3000, // until shown; a failed read is retried
		async refresh() {
			if (shown) return;
			try {
				const m = await get(`/v1/methods/${encodeURIComponent(id)}`);
				shown = true;
				msg.textContent = '';
				facts.textContent = `revision ${m.revision} (${m.revisions_stored} kept), stored ` +
					`${when(m.stored_at)} from ${m.source}; sha256 ${m.sha256}`;
				text.replaceChildren(numbered(m.text));
			} catch (e) {
				msg.textContent = e instanceof ApiError && e.status === 404
					? `There is no method ${id}.` : `method not read: ${errorText(e)}`;
			}
		},
	};
}

const REVISION_RE = /^(revision:[ \t]*)(\d+)/m;

export function editorView(root, id) {
	const msg = h('p', {class: 'view-error', role: 'alert'});
	const status = h('p', {class: 'check-status', role: 'status', 'aria-live': 'polite'});
	const gutter = h('div', {class: 'gutter', 'aria-hidden': 'true'});
	const notes = h('div', {class: 'notes', 'aria-hidden': 'true'});
	const area = h('textarea', {class: 'code', id: 'method-text', wrap: 'off', spellcheck: 'false',
		autocapitalize: 'off', autocomplete: 'off', 'aria-label': `YAML text of method ${id}`,
		'aria-describedby': 'diag-list'});
	const list = h('ul', {class: 'diagnostics', id: 'diag-list', 'aria-label': 'errors'});
	const check = h('button', {type: 'button', 'data-needs': 'admin'}, 'Check');
	const raise = h('button', {type: 'button', hidden: true, 'data-needs': 'admin'},
		'Raise revision');
	const save = h('button', {type: 'button', class: 'primary', 'data-needs': 'admin'},
		'Save as new revision');
	let stored = 0;
	let timer = 0;
	let lastDiags = [];
	root.append(h('div', {class: 'run-head'}, h('h1', {}, `Edit ${id}`),
		h('a', {href: `#/method/${encodeURIComponent(id)}`}, 'back to the method')),
	msg,
	h('div', {class: 'card'},
		h('div', {class: 'editor'}, gutter, area, notes),
		h('div', {class: 'editor-bar'}, check, raise, save, status),
		list));

	const lineCount = () => area.value.split('\n').length;
	const paint = () => {
		const n = lineCount();
		const byLine = new Map();
		for (const d of lastDiags) {
			if (!byLine.has(d.line)) byLine.set(d.line, []);
			byLine.get(d.line).push(d);
		}
		gutter.replaceChildren(...Array.from({length: n}, (_, i) => h('div', {
			class: byLine.has(i + 1) ? 'bad' : '', 'data-line': i + 1}, String(i + 1))));
		notes.replaceChildren(...Array.from({length: n}, (_, i) => {
			const ds = byLine.get(i + 1);
			const text = ds ? ds.map((d) => `${d.file}:${d.line}:${d.col}: ${d.message}`).join('; ')
				: '';
			return h('div', {class: ds ? 'bad' : '', 'data-line': i + 1, title: text || null}, text);
		}));
		sync();
	};
	const sync = () => {
		gutter.scrollTop = area.scrollTop;
		notes.scrollTop = area.scrollTop;
	};
	const goTo = (line, col) => {
		const lines = area.value.split('\n');
		let pos = 0;
		for (let i = 0; i < line - 1 && i < lines.length; i++) pos += lines[i].length + 1;
		pos += Math.max(0, (col || 1) - 1);
		area.focus();
		area.setSelectionRange(pos, pos);
	};
	const showDiags = (diags) => {
		lastDiags = diags;
		list.replaceChildren(...diags.map((d) => h('li', {'data-line': d.line},
			h('button', {type: 'button', class: 'link', onclick: () => goTo(d.line, d.col)},
				`${d.file}:${d.line}:${d.col}`), ` ${d.message}`)));
		paint();
	};
	const textRevision = () => {
		const m = REVISION_RE.exec(area.value);
		return m ? Number(m[2]) : null;
	};
	// Typing checks only once the token is there; Check and Save ask for it.
	const runCheck = async (asked) => {
		if (!getToken() && asked !== true) {
			status.textContent = 'Unlock writes (top right) to check the text as you type.';
			return null;
		}
		status.textContent = 'checking…';
		try {
			const r = await api('POST', `/v1/methods/${encodeURIComponent(id)}/check`, area.value);
			stored = r.stored_revision || 0;
			showDiags(r.diagnostics || []);
			if (!r.valid) {
				status.textContent = `${r.diagnostics.length} error${r.diagnostics.length === 1
					? '' : 's'}: not saved`;
				status.className = 'check-status bad';
			} else if (r.saves === false) {
				status.textContent = `valid, but revision ${r.revision} is not above the stored ` +
					`revision ${stored}: raise it to save`;
				status.className = 'check-status warn';
			} else {
				status.textContent = `valid: saves as revision ${r.revision}`;
				status.className = 'check-status good';
			}
			raise.hidden = !(r.valid && r.saves === false);
			return r;
		} catch (e) {
			status.textContent = `not checked: ${errorText(e)}`;
			status.className = 'check-status bad';
			return null;
		}
	};
	area.addEventListener('input', () => {
		paint();
		clearTimeout(timer);
		timer = setTimeout(runCheck, CHECK_DELAY_MS);
	});
	area.addEventListener('scroll', sync);
	area.addEventListener('keydown', (ev) => {
		// Tab indents (YAML wants spaces); Escape then Tab leaves the editor.
		if (ev.key === 'Tab' && !ev.shiftKey && !area.dataset.escaped) {
			ev.preventDefault();
			area.setRangeText('  ', area.selectionStart, area.selectionEnd, 'end');
			area.dispatchEvent(new Event('input'));
		}
		if (ev.key === 'Escape') area.dataset.escaped = '1';
		else if (ev.key !== 'Tab') delete area.dataset.escaped;
	});
	check.addEventListener('click', () => runCheck(true));
	raise.addEventListener('click', () => {
		const next = Math.max(stored, textRevision() || 0) + 1;
		area.value = REVISION_RE.test(area.value)
			? area.value.replace(REVISION_RE, `$1${next}`) : area.value;
		area.dispatchEvent(new Event('input'));
		clearTimeout(timer);
		runCheck(true);
	});
	save.addEventListener('click', async () => {
		clearTimeout(timer);
		const r = await runCheck(true);
		if (!r) return;
		if (!r.valid) {
			status.textContent = 'fix the errors marked at their lines first';
			return;
		}
		if (r.saves === false) return;
		try {
			const out = await api('PUT', `/v1/methods/${encodeURIComponent(id)}`, area.value);
			status.textContent = `saved as revision ${out.revision}`;
			status.className = 'check-status good';
			stored = out.revision;
			raise.hidden = true;
		} catch (e) {
			// 422 carries the same diagnostics as text lines.
			status.textContent = `not saved: ${errorText(e)}`;
			status.className = 'check-status bad';
		}
	});
	let loaded = false;
	return {
		every_ms: 3000, // until loaded; a failed read is retried
		async refresh() {
			if (loaded) return;
			try {
				const m = await get(`/v1/methods/${encodeURIComponent(id)}`);
				area.value = m.text;
				stored = m.revision;
				loaded = true;
				msg.textContent = '';
				paint();
				status.textContent = `revision ${m.revision} loaded; edit, then save as a new revision`;
			} catch (e) {
				if (e instanceof ApiError && e.status === 404) {
					area.value = `method: ${id}\ntitle: \nrevision: 1\n`;
					loaded = true;
					paint();
					status.textContent = 'a new method';
				} else {
					msg.textContent = `method not read: ${errorText(e)}`;
				}
			}
		},
	};
}
