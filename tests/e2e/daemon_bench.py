"""A real stopcock-sim and a real stopcockd for the end-to-end daemon tests.

Used by tests/test_daemon_*.py (not collected itself). Everything goes through
the public interfaces: the simulator's --config-out, the daemon's HTTP API
(urllib), signals, and the simulator's control socket.
"""
import json
import os
import pathlib
import signal
import socket
import subprocess
import time
import urllib.error
import urllib.request
from common import binary, build_dir, free_port  # noqa: E402

ROOT = pathlib.Path(__file__).resolve().parents[2]
DATA = ROOT / "tests" / "data" / "daemon"
SCENARIO = DATA / "wash-acid.yaml"
METHOD_MV = DATA / "wash-acid-mv.yaml"
# Stoichiometric volume of SCENARIO: 10 mL x 0.0200 mol/L / 0.1000 mol/L.
EXPECTED_ML = 2.000


class Reply:
    def __init__(self, status, body, headers):
        self.status = status
        self.body = body
        self.headers = headers

    def json(self):
        return json.loads(self.body)


class Bench:
    """stopcock-sim + stopcockd on free ports in a temporary directory."""

    def __init__(self, tmp, scenario=SCENARIO, extra_config="", rack=None, sim_args=()):
        self.tmp = pathlib.Path(tmp)
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.ctl = self.tmp / "ctl"
        self.config = self.tmp / "stopcockd.yaml"
        self.scenario = scenario
        self.sim_log = open(self.tmp / "sim.log", "w")
        self.daemon_log = open(self.tmp / "daemon.log", "a")
        self.daemon = None
        self.sim = subprocess.Popen(
            [binary("stopcock-sim"),
             *(["--rack", str(rack)] if rack else ["--scenario", str(scenario)]), "--modbus-tcp",
             f"127.0.0.1:{free_port()}", "--pump-link", str(self.tmp / "pump"),
             "--control", str(self.ctl), "--config-out", str(self.config),
             "--state-dir", str(self.tmp / "state"), "--listen", f"127.0.0.1:{self.port}",
             *sim_args],
            stdout=subprocess.PIPE, stderr=self.sim_log, text=True)
        line = self.sim.stdout.readline().strip()
        assert line == "ready", f"stopcock-sim printed {line!r}; see {self.tmp}/sim.log"
        if extra_config:
            with open(self.config, "a") as f:
                f.write(extra_config)
        self.token = (self.tmp / "token").read_text().strip().split(":", 1)[1]
        self.start_daemon()

    # ---- processes ----
    def start_daemon(self, wrap=(), wait_s=15, poll_s=0.05):
        """Start stopcockd (under `wrap`, e.g. valgrind, given `wait_s` to
        answer) and wait until its station has read its devices."""
        self.daemon = subprocess.Popen([*wrap, binary("stopcockd"), "-c", str(self.config)],
                                       stdout=self.daemon_log, stderr=self.daemon_log)
        deadline = time.monotonic() + wait_s
        while True:
            try:
                if self.request("GET", "/v1/health").status == 200:
                    break
            except OSError:
                pass
            assert self.daemon.poll() is None, f"stopcockd exited; see {self.tmp}/daemon.log"
            assert time.monotonic() < deadline, f"no /v1/health after {wait_s} s"
            time.sleep(poll_s)
        # Until the station has read its devices once it says "offline".
        deadline = time.monotonic() + wait_s
        while self.station()["state"] == "offline":
            assert time.monotonic() < deadline, f"station still offline after {wait_s} s"
            time.sleep(poll_s)

    def resume(self, name="sim1"):
        """An operator lets a station held after a restart start again
        (POST /v1/stations/{name}/resume, docs/operations.md)."""
        r = self.write("POST", f"/v1/stations/{name}/resume")
        assert r.status == 200, r.body
        return r.json()["resumed"]

    def stop_daemon(self, sig=signal.SIGTERM, timeout=15):
        self.daemon.send_signal(sig)
        rc = self.daemon.wait(timeout=timeout)
        return rc

    def close(self):
        rcs = []
        for p in (self.daemon, self.sim):
            if p is not None and p.poll() is None:
                p.send_signal(signal.SIGTERM)
                try:
                    rcs.append(p.wait(timeout=15))
                except subprocess.TimeoutExpired:
                    p.kill()
                    p.wait()
                    rcs.append("hung")
        self.sim.stdout.close()
        self.sim_log.close()
        self.daemon_log.close()
        log = (self.tmp / "daemon.log").read_text(errors="replace")
        # Under the sanitizer build (STOPCOCK_BUILD=.../san) reports land here.
        assert "Sanitizer" not in log and "runtime error" not in log, log[-4000:]
        assert rcs and rcs[0] == 0, f"stopcockd exited {rcs[0]} on SIGTERM; see {self.tmp}"

    # ---- the simulator ----
    def control(self, line):
        with socket.socket(socket.AF_UNIX) as s:
            s.settimeout(10)
            s.connect(str(self.ctl))
            s.sendall((line + "\n").encode())
            reply = s.makefile().readline().strip()
        return reply

    def sim_state(self):
        return json.loads(self.control("state"))

    def fresh_beaker(self):
        assert self.control(f"load {self.scenario}") == "ok"

    # ---- HTTP ----
    def request(self, method, path, body=None, token=None, headers=None, timeout=20):
        h = dict(headers or {})
        if token:
            h["Authorization"] = f"Bearer {token}"
        data = body.encode() if isinstance(body, str) else body
        req = urllib.request.Request(self.url + path, data=data, method=method, headers=h)
        try:
            with urllib.request.urlopen(req, timeout=timeout) as r:
                return Reply(r.status, r.read(), r.headers)
        except urllib.error.HTTPError as e:
            with e:
                return Reply(e.code, e.read(), e.headers)

    def get(self, path):
        r = self.request("GET", path)
        assert r.status == 200, (path, r.status, r.body)
        return r.json()

    def write(self, method, path, body=None):
        return self.request(method, path, body, token=self.token,
                            headers={"Content-Type": "application/json"})

    def station(self, name="sim1"):
        return next(s for s in self.get("/v1/stations")["stations"] if s["name"] == name)

    def put_method(self, path=METHOD_MV):
        name = pathlib.Path(path).stem
        r = self.write("PUT", f"/v1/methods/{name}", pathlib.Path(path).read_text())
        assert r.status in (200, 201), r.body
        return name

    def start_run(self, method="wash-acid-mv", sample="BATCH-7", amount=10.0):
        r = self.write("POST", "/v1/runs", json.dumps(
            {"station": "sim1", "method": method, "sample_id": sample, "amount": amount}))
        assert r.status == 201, r.body
        return r.json()["id"]

    def run(self, run_id):
        return self.get(f"/v1/runs/{run_id}")

    def wait_state(self, run_id, states, timeout_s=60):
        deadline = time.monotonic() + timeout_s
        while (rec := self.run(run_id))["state"] not in states:
            assert time.monotonic() < deadline, f"run {run_id} still {rec['state']}"
            time.sleep(0.1)
        return rec

    def wait_points(self, run_id, n, timeout_s=60):
        deadline = time.monotonic() + timeout_s
        while len(pts := self.get(f"/v1/runs/{run_id}/points")["points"]) < n:
            assert time.monotonic() < deadline, f"run {run_id}: {len(pts)} points"
            time.sleep(0.1)
        return pts
