"""Electrode calibration end to end, on the simulated bench.

stopcock-sim plays the bench; its control socket `load`s a new beaker for each
buffer, as an operator would change beakers. stopcockd runs the calibration
(POST /v1/calibrations, .../next) and must:
  - recover the simulated electrode's slope within 0.2 % and its offset within
    0.5 mV, with the buffers corrected to the bench's temperature (30 degC, so
    the technical 7.00 buffer is 6.99 and 10.01 is 9.97: common-practice table,
    docs/calibration.md);
  - refuse a `signal: ph` run (409) without a calibration, accept one with it,
    and refuse it again once the calibration has expired;
  - refuse buffers less than 1 pH apart (400).
Each buffer beaker is a half-neutralized weak acid whose pKa is tuned with
`stopcock curve` until the model's pH equals the table value, so the bench's
true pH is the buffer's value and any error is the daemon's.
"""

import json
import os
import re
import signal
import socket
import subprocess
import time
import urllib.error
import urllib.request
from pathlib import Path

import pytest
from common import build_dir, free_port  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
T_C = 30.0
# Technical buffers at 30 degC, the default table of docs/calibration.md
# (common practice, typical makers' tables [M]).
BUFFERS = [(4.01, 4.01), (7.00, 6.99), (10.01, 9.97)]
ELECTRODE = {"offset_mv": 12.0, "slope_pct": 97.5}
EXPIRES_H = 0.004  # 14.4 s: long enough to start one run, short enough to wait out


def read_line(proc, deadline_s):
    import select
    end = time.monotonic() + deadline_s
    buf = b""
    while time.monotonic() < end:
        r, _, _ = select.select([proc.stdout], [], [], 0.2)
        if r:
            ch = os.read(proc.stdout.fileno(), 1)
            if not ch:
                break
            if ch == b"\n":
                return buf.decode(errors="replace")
            buf += ch
    return buf.decode(errors="replace")


def scenario_text(pka, title):
    e = ELECTRODE
    return (f"title: {title}\n"
            f"temperature_c: {T_C}\n"
            "activity: ideal\n"
            "sample_ml: 50.0\n"
            "water_ml: 0.0\n"
            "sample:\n"
            f"  - {{name: buffer acid, molar: 0.5, pka: [{pka:.6f}]}}\n"
            "  - {name: sodium, molar: 0.25, strong: base}\n"
            "titrant:\n"
            "  - {name: sodium hydroxide, molar: 0.1000, strong: base}\n"
            f"electrode: {{offset_mv: {e['offset_mv']}, slope_pct: {e['slope_pct']}, "
            "tau_s: 1.0, noise_mv: 0.1, drift_mv_per_min: 0.0}\n"
            "burette: {capacity_ml: 10.0, steps: 20000}\n")


def model_ph(path):
    out = subprocess.run([str(build_dir() / "bin" / "stopcock"), "curve", str(path),
                          "--ml", "0"], capture_output=True, text=True, timeout=20)
    assert out.returncode == 0, out.stderr
    return float(out.stdout.splitlines()[1].split()[1])


def buffer_scenario(tmp, nominal, true_ph):
    """A beaker whose model pH is true_ph (within 0.0002), tuned by pKa."""
    path = tmp / f"buffer-{nominal:.2f}.yaml"
    pka = true_ph
    for _ in range(4):
        path.write_text(scenario_text(pka, f"technical buffer {nominal:.2f} at {T_C} degC"))
        ph = model_ph(path)
        if abs(ph - true_ph) < 0.0002:
            return path
        pka -= ph - true_ph
    raise AssertionError(f"could not tune the {nominal} beaker: model pH {ph}")


class Api:
    def __init__(self, base, token):
        self.base = base
        self.token = token

    def call(self, method, path, body=None):
        data = json.dumps(body).encode() if body is not None else None
        headers = {"Content-Type": "application/json"} if body is not None else {}
        if self.token:
            headers["Authorization"] = f"Bearer {self.token}"
        req = urllib.request.Request(self.base + path, data=data, method=method,
                                     headers=headers)
        try:
            with urllib.request.urlopen(req, timeout=10) as r:
                raw = r.read()
                return r.status, json.loads(raw) if raw else None
        except urllib.error.HTTPError as e:
            raw = e.read()
            try:
                return e.code, json.loads(raw)
            except ValueError:
                return e.code, raw


def control(sock_path, line):
    with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as s:
        s.settimeout(5)
        s.connect(str(sock_path))
        s.sendall((line + "\n").encode())
        reply = b""
        while not reply.endswith(b"\n"):
            chunk = s.recv(4096)
            if not chunk:
                break
            reply += chunk
    return reply.decode().strip()


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    bins = build_dir() / "bin"
    for b in ("stopcockd", "stopcock-sim", "stopcock"):
        assert (bins / b).exists(), f"{bins / b} is not built"
    tmp = tmp_path_factory.mktemp("calibration")
    beakers = [buffer_scenario(tmp, n, ph) for n, ph in BUFFERS]
    http_port = free_port()
    cfg = tmp / "stopcockd.yaml"
    sim = subprocess.Popen(
        [str(bins / "stopcock-sim"), "--scenario", str(beakers[0]),
         "--modbus-tcp", f"127.0.0.1:{free_port()}", "--pump-link", str(tmp / "pump"),
         "--control", str(tmp / "control"), "--config-out", str(cfg),
         "--state-dir", str(tmp), "--listen", f"127.0.0.1:{http_port}"],
        stdout=subprocess.PIPE, stderr=open(tmp / "sim.log", "wb"), cwd=ROOT)
    procs = [sim]
    try:
        line = read_line(sim, 20)
        assert line.strip() == "ready", f"stopcock-sim said {line!r}:\n" \
            f"{(tmp / 'sim.log').read_text()}"
        # A short window and validity keep this test quick; the logic is the
        # same as with the defaults (unit tests cover those).
        text = cfg.read_text().rstrip("\n") + "\n"
        assert "\ncalibration:" not in text
        text += ("calibration:\n"
                 f"  expires_h: {EXPIRES_H}\n"
                 "  stable: {drift_mv: 0.15, window_s: 4, min_s: 2, max_s: 60}\n")
        cfg.write_text(text)
        d = subprocess.Popen([str(bins / "stopcockd"), "-c", str(cfg)],
                             stdout=subprocess.DEVNULL, stderr=open(tmp / "d.log", "wb"),
                             cwd=ROOT)
        procs.append(d)
        token = ""
        for ln in (tmp / "token").read_text().splitlines():
            ln = ln.strip()
            if ln and not ln.startswith("#"):
                token = ln.split(":", 1)[1] if ":" in ln else ln
                break
        api = Api(f"http://127.0.0.1:{http_port}", token)
        end = time.monotonic() + 30
        while True:
            try:
                if api.call("GET", "/v1/health")[0] == 200:
                    break
            except OSError:
                pass
            assert d.poll() is None, f"stopcockd exited:\n{(tmp / 'd.log').read_text()}"
            assert time.monotonic() < end, \
                f"stopcockd never answered:\n{(tmp / 'd.log').read_text()}"
            time.sleep(0.2)
        yield {"api": api, "tmp": tmp, "beakers": beakers, "control": tmp / "control"}
    finally:
        for p in reversed(procs):
            if p.poll() is None:
                p.send_signal(signal.SIGTERM)
                try:
                    p.wait(timeout=15)
                except subprocess.TimeoutExpired:
                    p.kill()
                    p.wait()


def ph_run(api):
    return api.call("POST", "/v1/runs", {"station": "sim1", "method": "cider-acidity",
                                         "sample_id": "orchard-lane-batch-12",
                                         "amount": 10.0})


def error_message(body):
    return body["error"]["message"] if isinstance(body, dict) and "error" in body else str(body)


def wait_state(api, cal_id, leave, timeout_s):
    end = time.monotonic() + timeout_s
    while True:
        st, body = api.call("GET", f"/v1/calibrations/{cal_id}")
        assert st == 200, body
        if body["state"] not in leave:
            return body
        assert time.monotonic() < end, f"calibration stuck in {body['state']}: {body}"
        time.sleep(0.25)


def test_calibration_on_the_bench(bench):
    api = bench["api"]

    # No calibration yet: a pH run is refused, and the message says why.
    st, body = ph_run(api)
    assert st == 409, body
    assert "calibration" in error_message(body)

    # Buffers too close together are bad input.
    st, body = api.call("POST", "/v1/calibrations", {"station": "sim1",
                                                     "buffers": [4.01, 4.5]})
    assert st == 400, body
    assert "1 pH" in error_message(body)

    st, body = api.call("POST", "/v1/calibrations",
                        {"station": "sim1", "buffers": [n for n, _ in BUFFERS]})
    assert st == 201, body
    assert body["state"] == "waiting" and body["next_buffer"] == pytest.approx(4.01)
    cal_id = body["id"]
    t0 = time.monotonic()

    for i, (nominal, _) in enumerate(BUFFERS):
        cal = wait_state(api, cal_id, ("measuring",), 5)
        assert cal["state"] == "waiting", cal
        assert cal["next_buffer"] == pytest.approx(nominal)
        # The operator changes beakers, then says so.
        assert control(bench["control"], f"load {bench['beakers'][i]}") == "ok"
        st, body = api.call("POST", f"/v1/calibrations/{cal_id}/next", {})
        assert st in (200, 202), body
        # A second `next` while measuring is the wrong state.
        st2, body2 = api.call("POST", f"/v1/calibrations/{cal_id}/next", {})
        assert st2 == 409, body2
        wait_state(api, cal_id, ("measuring",), 60)

    cal = wait_state(api, cal_id, ("measuring", "waiting"), 5)
    print(f"\ncalibration on the bench: slope {cal['slope_pct']:.3f} % (true "
          f"{ELECTRODE['slope_pct']}), offset {cal['offset_mv']:.3f} mV (true "
          f"{ELECTRODE['offset_mv']}), took {time.monotonic() - t0:.1f} s")
    assert cal["state"] == "accepted", cal
    # The simulated electrode: slope 97.5 % of Nernst, 12.0 mV at pH 7.
    assert cal["slope_pct"] == pytest.approx(ELECTRODE["slope_pct"], abs=0.2)
    assert cal["offset_mv"] == pytest.approx(ELECTRODE["offset_mv"], abs=0.5)
    assert cal["temperature_c"] == pytest.approx(T_C, abs=0.1)
    assert [b["ph"] for b in cal["buffers"]] == pytest.approx([p for _, p in BUFFERS],
                                                              abs=1e-9)
    assert all(b["mv"] is not None for b in cal["buffers"])
    assert cal["at"] and cal["expires_at"]
    assert re.match(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(\.\d+)?Z$", cal["at"])

    st, latest = api.call("GET", "/v1/calibrations/latest?station=sim1")
    assert st == 200 and latest["id"] == cal_id

    # With the calibration, a pH run starts and records the calibration.
    st, body = ph_run(api)
    assert st == 201, body
    run_id = body["id"]
    st, body = api.call("POST", f"/v1/runs/{run_id}/abort", {})
    assert st in (200, 202), body
    end = time.monotonic() + 20
    while True:
        st, rec = api.call("GET", f"/v1/runs/{run_id}")
        assert st == 200
        if rec["state"] not in ("queued", "running"):
            break
        assert time.monotonic() < end, rec
        time.sleep(0.2)
    if rec.get("calibration") is not None:
        assert rec["calibration"]["slope_pct"] == pytest.approx(cal["slope_pct"], abs=1e-6)

    # Once expired, pH runs are refused again.
    from datetime import datetime, timezone
    expires = datetime.strptime(cal["expires_at"].replace("Z", "+0000"),
                                "%Y-%m-%dT%H:%M:%S.%f%z")
    wait_s = (expires - datetime.now(timezone.utc)).total_seconds() + 0.5
    assert wait_s < EXPIRES_H * 3600 + 1
    if wait_s > 0:
        time.sleep(wait_s)
    st, body = ph_run(api)
    assert st == 409, body
    assert "expired" in error_message(body)
