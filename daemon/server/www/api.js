// api.js: talking to stopcockd, the write token, and small DOM helpers.
//
// The token lives in sessionStorage only: it is gone when the tab closes, is
// never put in a URL, and is sent as "Authorization: Bearer" on every request
// (reads need it too when the daemon's http.read_needs_token is set).

const TOKEN_KEY = 'stopcock.token';
const TIMEOUT_MS = 10000; // every request has a deadline

export class ApiError extends Error {
	constructor(status, code, message, body) {
		super(message);
		this.status = status;
		this.code = code;
		this.body = body;
	}
}

export function getToken() {
	try {
		return sessionStorage.getItem(TOKEN_KEY) || '';
	} catch {
		return '';
	}
}

function setToken(t) {
	try {
		if (t) sessionStorage.setItem(TOKEN_KEY, t);
		else sessionStorage.removeItem(TOKEN_KEY);
	} catch {
		/* storage refused (private mode): the token is not kept */
	}
	showTokenState();
}

export function forgetToken() {
	setToken('');
}

// ---- link state: shown in the header, so a stopped daemon is visible ----

let lastOk = 0;
let down = false;

function setLink(ok) {
	const el = document.getElementById('link');
	if (ok) {
		lastOk = Date.now();
		if (down || !el.classList.contains('up')) {
			down = false;
			el.textContent = 'daemon connected';
			el.className = 'link up';
		}
		return;
	}
	down = true;
	el.className = 'link down';
	el.textContent = lastOk
		? `daemon not answering since ${when(new Date(lastOk).toISOString()).slice(11)}, retrying`
		: 'daemon not answering, retrying';
}

export function linkIsDown() {
	return down;
}

// ---- requests ----

async function once(method, path, body, asText) {
	const headers = {};
	const t = getToken();
	let payload;
	if (t) headers.Authorization = `Bearer ${t}`;
	if (typeof body === 'string') {
		headers['Content-Type'] = 'application/yaml';
		payload = body;
	} else if (body !== undefined) {
		headers['Content-Type'] = 'application/json';
		payload = JSON.stringify(body);
	}
	let resp;
	try {
		resp = await fetch(path, {
			method,
			headers,
			body: payload,
			cache: 'no-store',
			credentials: 'omit',
			signal: AbortSignal.timeout(TIMEOUT_MS),
		});
	} catch (e) {
		setLink(false);
		throw new ApiError(0, 'unreachable', 'the daemon is not answering', null);
	}
	setLink(true);
	const text = await resp.text();
	if (resp.ok) {
		if (asText) return text;
		return text ? JSON.parse(text) : null;
	}
	let parsed = null;
	try {
		parsed = JSON.parse(text);
	} catch {
		/* not JSON: keep the status */
	}
	const err = parsed && parsed.error ? parsed.error : {};
	throw new ApiError(resp.status, err.code || `http_${resp.status}`,
		err.message || `HTTP ${resp.status}`, parsed);
}

// A write asks for the token first when there is none, and once more when
// the daemon refuses the one it has (401).
export async function api(method, path, body, opts = {}) {
	const write = method !== 'GET';
	if (write && !getToken() && !(await askToken('This needs the write token.')))
		throw new ApiError(401, 'no_token', 'no write token given', null);
	try {
		return await once(method, path, body, opts.text);
	} catch (e) {
		if (e.status !== 401) throw e;
		forgetToken();
		if (!(await askToken('The daemon refused that token; enter it again.')))
			throw e;
		return once(method, path, body, opts.text);
	}
}

export const get = (path, opts) => api('GET', path, undefined, opts);

// ---- dialogs ----

// One question at a time: polls and a click that need the token while the
// dialog is open share its answer.
let asking = null;

export function askToken(note) {
	if (!asking)
		asking = ask(note).finally(() => {
			asking = null;
		});
	return asking;
}

// The dialog takes the token alone or its whole `name:token` or
// `name:role,role:token` line from the token file, as the CLI reads it.
export function tokenOf(text) {
	const t = text.trim();
	const parts = t.split(':');
	// a middle field of lower-case words is the roles, else part of the token
	const skip = parts.length > 2 && /^[a-z,]+$/.test(parts[1]) ? 2 : 1;
	return (parts.length > 1 ? parts.slice(skip).join(':') : t).trim();
}

// What the token may do (GET /v1/whoami), as classes on <body>: "has-token"
// and "can-ROLE"; app.css hides each [data-needs=ROLE] the token lacks. No
// token: everything shows, and a click asks for one.
async function showRoles() {
	const b = document.body;
	for (const c of [...b.classList]) if (c.startsWith('can-')) b.classList.remove(c);
	b.classList.toggle('has-token', !!getToken());
	if (!getToken()) return;
	try {
		const headers = {Authorization: `Bearer ${getToken()}`};
		const r = await fetch('/v1/whoami', {headers, cache: 'no-store'});
		if (!r.ok) return;
		for (const role of (await r.json()).roles || []) b.classList.add(`can-${role}`);
	} catch {
		/* the link state shows a daemon that does not answer */
	}
}

function ask(note) {
	const dlg = document.getElementById('token-dialog');
	const input = document.getElementById('token-input');
	document.getElementById('token-note').textContent = note || '';
	input.value = '';
	return new Promise((resolve) => {
		const done = (value) => {
			dlg.removeEventListener('close', onClose);
			resolve(value);
		};
		const onClose = () => {
			const v = dlg.returnValue === 'ok' ? tokenOf(input.value) : '';
			input.value = '';
			if (v) setToken(v);
			done(v);
		};
		dlg.addEventListener('close', onClose);
		dlg.returnValue = '';
		dlg.showModal();
		input.focus();
	});
}

export function confirmAction(title, text, yesLabel) {
	const dlg = document.getElementById('confirm-dialog');
	document.getElementById('confirm-title').textContent = title;
	document.getElementById('confirm-text').textContent = text;
	document.getElementById('confirm-yes').textContent = yesLabel || 'Yes';
	return new Promise((resolve) => {
		dlg.addEventListener('close', () => resolve(dlg.returnValue === 'yes'), {once: true});
		dlg.returnValue = '';
		dlg.showModal();
		// Safer default: Enter on a fresh dialog cancels.
		document.getElementById('confirm-no').focus();
	});
}

export function showTokenState() {
	const b = document.getElementById('token-button');
	if (!b) return;
	const have = !!getToken();
	b.textContent = have ? 'Writes unlocked · lock' : 'Unlock writes';
	b.setAttribute('aria-pressed', have ? 'true' : 'false');
	showRoles();
}

export function setupToken() {
	const dlg = document.getElementById('token-dialog');
	document.getElementById('token-cancel').addEventListener('click', () => dlg.close('cancel'));
	document.getElementById('token-button').addEventListener('click', () => {
		if (getToken()) forgetToken();
		else askToken('');
	});
	showTokenState();
}

// ---- DOM ----

// h('a', {href: '#/x', class: 'y'}, 'text', child...): elements from data,
// never from HTML strings, so no run or method text can inject markup.
export function h(tag, attrs, ...children) {
	const el = document.createElement(tag);
	for (const [k, v] of Object.entries(attrs || {})) {
		if (v === undefined || v === null || v === false) continue;
		if (k.startsWith('on')) el.addEventListener(k.slice(2), v);
		else if (k === 'class') el.className = v;
		else if (v === true) el.setAttribute(k, '');
		else el.setAttribute(k, String(v));
	}
	append(el, children);
	return el;
}

function append(el, children) {
	for (const c of children) {
		if (c === undefined || c === null || c === false) continue;
		if (Array.isArray(c)) append(el, c);
		else el.append(c instanceof Node ? c : document.createTextNode(String(c)));
	}
}

export function fmt(v, digits) {
	return typeof v === 'number' && Number.isFinite(v) ? v.toFixed(digits) : '—';
}

// Local time as 2026-12-01 14:05:09 UTC+01:00: one order of fields whatever
// the browser's locale, sortable, the date first as in the lab's records, and
// the offset from UTC so that a time read elsewhere is not an hour off.
export function when(rfc3339) {
	if (!rfc3339) return '—';
	const d = new Date(rfc3339);
	if (Number.isNaN(d.getTime())) return rfc3339;
	const p = (n) => String(n).padStart(2, '0');
	const off = -d.getTimezoneOffset();
	const zone = `UTC${off < 0 ? '−' : '+'}${p(Math.floor(Math.abs(off) / 60))}:${p(Math.abs(off) % 60)}`;
	return `${d.getFullYear()}-${p(d.getMonth() + 1)}-${p(d.getDate())} ` +
		`${p(d.getHours())}:${p(d.getMinutes())}:${p(d.getSeconds())} ${zone}`;
}

export function errorText(e) {
	if (e instanceof ApiError) return e.status ? `${e.message} (${e.status})` : e.message;
	return String(e && e.message ? e.message : e);
}
