// chart.js: the titration curve (signal against volume), its first derivative
// on a second axis, and the endpoints, drawn as SVG from the run's points.

const NS = 'http://www.w3.org/2000/svg';
const W = 760, H = 380; // viewBox units; the SVG scales to its box
const M = {l: 58, r: 62, t: 28, b: 44};

function s(tag, attrs, text) {
	const el = document.createElementNS(NS, tag);
	for (const [k, v] of Object.entries(attrs || {})) el.setAttribute(k, String(v));
	if (text !== undefined) el.textContent = text;
	return el;
}

// Round steps of 1, 2 or 5 times a power of ten, about n of them over [lo, hi].
function ticks(lo, hi, n) {
	const span = hi - lo || 1;
	const raw = span / n;
	const p = 10 ** Math.floor(Math.log10(raw));
	const step = [1, 2, 5, 10].map((m) => m * p).find((x) => x >= raw) || 10 * p;
	const out = [];
	for (let v = Math.ceil(lo / step) * step; v <= hi + step * 1e-9; v += step)
		out.push(Math.abs(v) < step * 1e-9 ? 0 : v);
	return {step, values: out};
}

function decimals(step) {
	return Math.max(0, Math.min(4, -Math.floor(Math.log10(step) + 1e-9)));
}

export function newChart(label) {
	const svg = s('svg', {viewBox: `0 0 ${W} ${H}`, class: 'chart', role: 'img',
		'aria-label': label});
	return svg;
}

// points: [{volume_ml, ph, mv, dpdv}], endpoints: [{n, volume_ml, ph, mv}],
// signal: 'ph' | 'mv'.
export function drawChart(svg, points, endpoints, signal) {
	while (svg.firstChild) svg.firstChild.remove();
	const key = signal === 'mv' ? 'mv' : 'ph';
	const unit = signal === 'mv' ? 'mV' : 'pH';
	const pts = points.filter((p) => Number.isFinite(p.volume_ml) && Number.isFinite(p[key]));
	const vmax = Math.max(1, ...pts.map((p) => p.volume_ml)) * 1.05;
	let ylo = Math.min(...pts.map((p) => p[key]));
	let yhi = Math.max(...pts.map((p) => p[key]));
	if (!pts.length) {
		ylo = signal === 'mv' ? -300 : 2;
		yhi = signal === 'mv' ? 300 : 12;
	}
	const pad = Math.max((yhi - ylo) * 0.08, signal === 'mv' ? 10 : 0.2);
	ylo -= pad;
	yhi += pad;
	const ds = pts.filter((p) => Number.isFinite(p.dpdv)).map((p) => Math.abs(p.dpdv));
	const dmax = Math.max(1e-9, ...ds) * 1.1;
	const x = (v) => M.l + (v / vmax) * (W - M.l - M.r);
	const y = (v) => H - M.b - ((v - ylo) / (yhi - ylo)) * (H - M.t - M.b);
	const yd = (v) => H - M.b - (Math.abs(v) / dmax) * (H - M.t - M.b);

	const grid = s('g', {class: 'grid'});
	const xt = ticks(0, vmax, 8);
	for (const v of xt.values) {
		grid.append(s('line', {x1: x(v), x2: x(v), y1: M.t, y2: H - M.b}));
		svg.append(s('text', {x: x(v), y: H - M.b + 18, class: 'tick mid'},
			v.toFixed(decimals(xt.step))));
	}
	const yt = ticks(ylo, yhi, 6);
	for (const v of yt.values) {
		grid.append(s('line', {x1: M.l, x2: W - M.r, y1: y(v), y2: y(v)}));
		svg.append(s('text', {x: M.l - 8, y: y(v) + 4, class: 'tick end'},
			v.toFixed(decimals(yt.step))));
	}
	const dt = ticks(0, dmax, 5);
	for (const v of dt.values)
		svg.append(s('text', {x: W - M.r + 8, y: yd(v) + 4, class: 'tick deriv'},
			v.toFixed(decimals(dt.step))));
	svg.prepend(grid);
	svg.append(s('rect', {x: M.l, y: M.t, width: W - M.l - M.r, height: H - M.t - M.b,
		class: 'frame'}));
	// The same words as the SVG of GET /v1/runs/{id}/curve.svg (daemon/core/svg.c).
	svg.append(s('text', {x: (M.l + W - M.r) / 2, y: H - 8, class: 'axis mid'},
		'titrant added (mL)'));
	svg.append(s('text', {x: 14, y: M.t - 10, class: 'axis'},
		signal === 'mv' ? 'potential (mV)' : 'pH'));
	svg.append(s('text', {x: W - 8, y: M.t - 10, class: 'axis end deriv'},
		`first derivative (${unit}/mL)`));

	const dpts = pts.filter((p) => Number.isFinite(p.dpdv));
	if (dpts.length > 1)
		svg.append(s('polyline', {class: 'deriv-line',
			points: dpts.map((p) => `${x(p.volume_ml).toFixed(1)},${yd(p.dpdv).toFixed(1)}`)
				.join(' ')}));
	if (pts.length > 1)
		svg.append(s('polyline', {class: 'curve-line',
			points: pts.map((p) => `${x(p.volume_ml).toFixed(1)},${y(p[key]).toFixed(1)}`)
				.join(' ')}));
	const dots = s('g', {class: 'dots'});
	for (const p of pts)
		dots.append(s('circle', {cx: x(p.volume_ml).toFixed(1), cy: y(p[key]).toFixed(1),
			r: 2.6}));
	svg.append(dots);

	for (const e of endpoints || []) {
		if (!Number.isFinite(e.volume_ml)) continue;
		const ex = x(e.volume_ml);
		const g = s('g', {class: 'endpoint', 'data-endpoint': e.n});
		g.append(s('line', {x1: ex, x2: ex, y1: M.t, y2: H - M.b}));
		// Left of the line in the right third, so the label never runs over
		// the derivative's axis.
		const left = ex > M.l + (W - M.l - M.r) * 2 / 3;
		g.append(s('text', {x: left ? ex - 5 : ex + 5, y: M.t + 14 + 14 * ((e.n || 1) - 1),
			class: left ? 'end' : ''}, `E${e.n} ${e.volume_ml.toFixed(3)} mL`));
		svg.append(g);
	}
	svg.setAttribute('data-points', String(pts.length));
}
