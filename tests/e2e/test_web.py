"""The bench page in a real browser, against a real daemon on the simulated bench.

Starts stopcock-sim + stopcockd (tests/e2e/daemon_bench.py), then runs
tests/web/test_page.mjs (node + playwright-core driving Debian's
/usr/bin/chromium) with the URL, token and control socket in its environment.
The script starts a run from the page and watches the curve grow and the
result appear, halts a run from the page, edits a method (an error shown at its
line, fixed, saved as a new revision), walks a calibration buffer by buffer and
watches the page recover when the daemon restarts; it asks this wrapper to
stop and start the daemon with lines "REQUEST stop-daemon" / "REQUEST
start-daemon" on its stdout, answered on its stdin. Screenshots of each view go
to tests/out/web/ (named in docs/bench-page.md).

Also checks the static file serving itself: headers (CSP without inline
script, nosniff, no CORS), content types, directory traversal, and that the
page's files never carry the token.

Missing chromium or playwright-core fails (make deps installs both).
"""
import json
import os
import pathlib
import queue
import shutil
import signal
import subprocess
import threading
import time

import pytest

import daemon_bench as db

ROOT = pathlib.Path(__file__).resolve().parents[2]
WEB = ROOT / "tests" / "web"
OUT = ROOT / "tests" / "out" / "web"
CHROMIUM = "/usr/bin/chromium"
SCRIPT_TIMEOUT_S = 150
# Stability window for calibration buffers, short so the walk is quick (the
# logic is the same as with the defaults; tests/e2e/test_calibration.py does the same).
CALIB_CONFIG = ("calibration:\n"
                "  stable: {drift_mv: 0.3, window_s: 3, min_s: 1.5, max_s: 60}\n")


READ_TOKEN = "web-read-only-token-0123456789"


def buffer_scenario(tmp, ph):
    """A beaker that is a buffer of pH ~ `ph`: a weak acid of pKa `ph`, half
    neutralised (Henderson-Hasselbalch: pH = pKa at equal acid and base)."""
    path = tmp / f"buffer-{ph:.2f}.yaml"
    path.write_text(
        f"title: Fernhill Water Co-op bench buffer {ph:.2f}\n"
        "temperature_c: 25\nactivity: ideal\nsample_ml: 50.0\nwater_ml: 0.0\n"
        f"sample:\n  - {{name: buffer acid, molar: 0.5, pka: [{ph}]}}\n"
        "  - {name: sodium, molar: 0.25, strong: base}\n"
        "titrant:\n  - {name: sodium hydroxide, molar: 0.1000, strong: base}\n"
        "electrode: {offset_mv: 2.0, slope_pct: 99.0, tau_s: 0.3, noise_mv: 0.05, "
        "drift_mv_per_min: 0.0}\n"
        "burette: {capacity_ml: 10.0, steps: 20000}\n")
    return path


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    b = db.Bench(tmp_path_factory.mktemp("web"), extra_config=CALIB_CONFIG)
    b.put_method()
    # A token that may only read: the page hides what it cannot do.
    with open(b.tmp / "token", "a") as f:
        f.write(f"lims:read:{READ_TOKEN}\n")
    b.daemon.send_signal(signal.SIGHUP)
    deadline = time.monotonic() + 10
    while b.request("GET", "/v1/whoami", token=READ_TOKEN).status != 200:
        assert time.monotonic() < deadline, "SIGHUP did not load the tokens"
        time.sleep(0.1)
    yield b
    b.close()


def raw(bench, path, method="GET", headers=None):
    return bench.request(method, path, headers=headers)


def test_index_is_served_with_security_headers(bench):
    r = raw(bench, "/")
    assert r.status == 200
    assert r.headers["Content-Type"] == "text/html; charset=utf-8"
    csp = r.headers["Content-Security-Policy"]
    assert "script-src 'self'" in csp and "'unsafe-inline'" not in csp
    assert "frame-ancestors 'none'" in csp and "connect-src 'self'" in csp
    assert r.headers["X-Content-Type-Options"] == "nosniff"
    assert "Access-Control-Allow-Origin" not in r.headers
    html = r.body.decode()
    assert '<script type="module" src="/www/app.js"></script>' in html
    # No inline script or style for a strict CSP to block.
    assert "<script>" not in html and "style=" not in html and "<style" not in html
    assert bench.token not in html


def test_page_files_types_and_no_token(bench):
    for name, ctype in [("app.js", "text/javascript; charset=utf-8"),
                        ("api.js", "text/javascript; charset=utf-8"),
                        ("app.css", "text/css; charset=utf-8"),
                        ("favicon.svg", "image/svg+xml")]:
        r = raw(bench, f"/www/{name}")
        assert r.status == 200, name
        assert r.headers["Content-Type"] == ctype, name
        assert bench.token.encode() not in r.body
        assert (ROOT / "daemon" / "server" / "www" / name).read_bytes() == r.body
    # A cross-origin page gets no CORS grant from the API either.
    r = raw(bench, "/v1/stations", headers={"Origin": "http://elsewhere.example"})
    assert r.status == 200 and "Access-Control-Allow-Origin" not in r.headers


@pytest.mark.parametrize("path", [
    "/www/../stopcockd.yaml", "/www/..%2f..%2fetc%2fpasswd", "/www/%2e%2e/token",
    "/www/.hidden.js", "/www/App.js", "/www/nothing.js", "/www/app.js.bak",
    "/www/sub/app.js", "/www/", "/index.html"])
def test_no_traversal_or_unknown_files(bench, path):
    r = raw(bench, path)
    assert r.status == 404, (path, r.status, r.body[:200])
    assert b"root:" not in r.body and bench.token.encode() not in r.body


def test_static_files_refuse_writes(bench):
    r = bench.write("POST", "/www/app.js", "x")
    assert r.status == 405


def test_runs_list_and_method_check_routes(bench):
    # The two routes the page needs beyond the LIMS contract of docs/lims.md.
    assert bench.get("/v1/runs?state=finished&since=2000-01-01")["runs"] is not None
    assert raw(bench, "/v1/runs?state=bogus").status == 400
    assert raw(bench, "/v1/runs?since=yesterday").status == 400
    text = (db.METHOD_MV).read_text().replace("dose_min_ml: 0.02", "dose_min_ml: -0.02")
    r = bench.write("POST", "/v1/methods/wash-acid-mv/check", text)
    assert r.status == 200, r.body
    j = r.json()
    assert j["valid"] is False and j["stored_revision"] >= 1
    line = next(i for i, ln in enumerate(text.splitlines(), 1) if "dose_min_ml" in ln)
    assert any(d["line"] == line and "dose_min_ml" in d["message"] for d in j["diagnostics"]), j
    assert raw(bench, "/v1/methods/wash-acid-mv/check", method="POST").status == 401
    # Checking stores nothing.
    assert bench.get("/v1/methods/wash-acid-mv")["revision"] == j["stored_revision"]


def node_bin():
    n = shutil.which("node")
    assert n, "node is missing: run `make deps` (installs nodejs and the test's npm package)"
    return n


def test_bench_page_in_chromium(bench, tmp_path):
    assert os.path.exists(CHROMIUM), \
        f"{CHROMIUM} is missing: run `make deps` (installs Debian's chromium)"
    assert (WEB / "node_modules" / "playwright-core").is_dir(), \
        "tests/web/node_modules/playwright-core is missing: run `make deps`"
    OUT.mkdir(parents=True, exist_ok=True)
    for old in OUT.glob("*.png"):
        old.unlink()
    buffers = [[ph, str(buffer_scenario(tmp_path, ph))] for ph in (4.01, 7.00, 10.01)]
    # A work list with an error of each kind, and what the CLI says of it:
    # the page must say the same (docs/bench-page.md, "Starting a series").
    worklist = ('\ufeffsample_id,method,amount,bogus,method,position,factor:dilution\r\n'
                'A,M,weigh,1,x,1;0,2\r\n,x,0\n\nB,m,5,1,m,"3 4",two\n"x\n')
    (tmp_path / "mixed.csv").write_text(worklist, encoding="utf-8")
    cli = subprocess.run([db.binary("stopcock"), "series", "start", "--station", "sim1",
                          "mixed.csv"], cwd=tmp_path, capture_output=True, text=True, timeout=30)
    assert cli.returncode != 0 and cli.stderr.count("mixed.csv:") >= 6, cli.stderr
    env = dict(os.environ,
               STOPCOCK_URL=bench.url, STOPCOCK_TOKEN=bench.token,
               STOPCOCK_READ_TOKEN=READ_TOKEN,
               STOPCOCK_CONTROL=str(bench.ctl), STOPCOCK_SCENARIO=str(bench.scenario),
               STOPCOCK_BUFFERS=json.dumps(buffers), STOPCOCK_SHOTS=str(OUT),
               STOPCOCK_WORKLIST=json.dumps({"text": worklist,
                                             "cli": cli.stderr.strip().splitlines()}))
    log = open(OUT / "test_page.log", "w")
    p = subprocess.Popen([node_bin(), str(WEB / "test_page.mjs")], cwd=ROOT, env=env,
                         stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=log, text=True)
    # A thread reads the script's lines (select() on a buffered pipe would
    # miss lines already read into the buffer).
    q = queue.Queue()
    threading.Thread(target=lambda: [q.put(x) for x in iter(p.stdout.readline, "")] + [q.put(None)],
                     daemon=True).start()
    deadline = time.monotonic() + SCRIPT_TIMEOUT_S
    lines = []
    try:
        while True:
            left = deadline - time.monotonic()
            assert left > 0, "test_page.mjs ran too long:\n" + "".join(lines[-30:])
            try:
                line = q.get(timeout=min(left, 1.0))
            except queue.Empty:
                continue
            if line is None:
                break
            lines.append(line)
            log.write(line)
            log.flush()
            if line.startswith("REQUEST "):
                what = line.split()[1]
                if what == "stop-daemon":
                    assert bench.stop_daemon() == 0
                elif what == "start-daemon":
                    bench.start_daemon()
                p.stdin.write("done\n")
                p.stdin.flush()
        rc = p.wait(timeout=20)
    finally:
        if p.poll() is None:
            p.kill()
            p.wait()
        log.close()
    out = "".join(lines)
    assert rc == 0, f"test_page.mjs exited {rc}:\n{out[-4000:]}\n" \
        f"{(OUT / 'test_page.log').read_text()[-3000:]}"
    assert "ALL PASSED" in out
    shots = sorted(x.name for x in OUT.glob("*.png"))
    assert len(shots) >= 12, shots
