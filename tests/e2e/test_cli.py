"""The `stopcock` client commands against a real stopcockd driving a real
stopcock-sim (start, status, show, wait, abort, halt; CSV and SVG outputs;
errors when the daemon is down; bad arguments exit 2).

Reference values come from the daemon's own API (read with urllib), so the
client is checked for showing what the daemon holds, not for chemistry (the
daemon's tests check the endpoint against the stoichiometric volume).
"""

import json
import os
import re
import signal
import socket
import subprocess
import time
import urllib.request
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest
from common import binary, build_dir, free_port  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]


def cider_scenario():
    """The example method's own scenario (config/methods/cider-acidity.yaml)."""
    p = ROOT / "config" / "scenarios" / "cider-acidity.yaml"
    assert p.exists(), f"{p} is missing"
    return p


BUFFERS = ("4.01", "7.00", "10.01")


def quick_electrode(text):
    """The scenario's electrode with a 0.5 s lag (tau_s), so readings settle
    sooner: these tests check the client, not the electrode model."""
    return re.sub(r"tau_s: *[0-9.]+", "tau_s: 0.5", text)


def small_cider(tmp):
    """The cider scenario with 2 mL of cider in the beaker instead of 10: the same
    curve shape with a fifth of the titrant, so a whole run takes less time."""
    text = quick_electrode(cider_scenario().read_text())
    small, n = re.subn(r"(?m)^sample_ml:.*$", "sample_ml: 2.0", text)
    assert n == 1, "the cider scenario has no sample_ml line"
    p = tmp / "cider-2ml.yaml"
    p.write_text(small)
    return p


def buffer_scenarios(tmp):
    """One beaker per calibration buffer, with the cider scenario's electrode: an
    acid with pKa equal to the buffer's pH, half neutralized (ideal activities)."""
    m = re.search(r"(?m)^electrode:.*$", cider_scenario().read_text())
    ideal = "electrode: {offset_mv: 0.0, slope_pct: 100.0}"
    electrode = quick_electrode(m.group(0) if m else ideal)
    paths = {}
    for b in BUFFERS:
        p = tmp / f"buffer-{b}.yaml"
        p.write_text(f"""title: buffer pH {b}
temperature_c: 25
activity: ideal
sample_ml: 50.0
water_ml: 0.0
sample:
  - {{name: buffer acid, molar: 0.10, pka: [{b}]}}
  - {{name: sodium, molar: 0.05, strong: base}}
titrant:
  - {{name: sodium hydroxide, molar: 0.1000, strong: base}}
{electrode}
""")
        paths[b] = p
    return paths


def cli(*args, env=None, timeout=60, stdin=None):
    return subprocess.run([binary("stopcock"), *map(str, args)], capture_output=True, text=True,
                          timeout=timeout, env=env, input=stdin)


class Bench:
    """stopcock-sim + stopcockd on free ports, in a temporary directory."""

    def __init__(self, tmp):
        self.tmp = tmp
        self.http_port = free_port()
        self.url = f"http://127.0.0.1:{self.http_port}"
        self.ctl = tmp / "ctl"
        self.config = tmp / "stopcockd.yaml"
        self.token = tmp / "token"
        self.sim_log = open(tmp / "sim.log", "w")
        self.daemon_log = open(tmp / "daemon.log", "w")
        self.cider = small_cider(tmp)
        self.sim = subprocess.Popen(
            [binary("stopcock-sim"), "--scenario", str(self.cider), "--modbus-tcp",
             f"127.0.0.1:{free_port()}", "--pump-link", str(tmp / "pump"), "--control",
             str(self.ctl), "--config-out", str(self.config), "--state-dir", str(tmp / "state"),
             "--listen", f"127.0.0.1:{self.http_port}"],
            stdout=subprocess.PIPE, stderr=self.sim_log, text=True)
        line = self.sim.stdout.readline().strip()
        assert line == "ready", f"stopcock-sim printed {line!r}; see {tmp}/sim.log"
        # Buffers count as stable sooner than the default, to keep the tests short.
        with open(self.config, "a") as f:
            f.write("calibration:\n  stable: {drift_mv: 0.3, window_s: 3, min_s: 2, max_s: 90}\n")
        self.daemon = subprocess.Popen([binary("stopcockd"), "-c", str(self.config)],
                                       stdout=self.daemon_log, stderr=self.daemon_log)
        deadline = time.monotonic() + 15
        while True:
            try:
                self.get("/v1/health")
                break
            except OSError:
                assert self.daemon.poll() is None, f"stopcockd exited; see {tmp}/daemon.log"
                assert time.monotonic() < deadline, "no /v1/health after 15 s"
                time.sleep(0.1)
        self.env = dict(os.environ, STOPCOCK_URL=self.url, STOPCOCK_TOKEN_FILE=str(self.token))
        # cider-acidity takes minutes on a real-time bench; the client tests
        # need a run that ends, so they use a coarse variant of it.
        self.method = self.put_method(ROOT / "tests" / "data" / "demo" / "cli-quick.yaml")

    def put_method(self, path):
        """Store a method file through PUT /v1/methods/{id} (the write token)."""
        token = self.token.read_text().splitlines()[0].split(":", 1)[1]
        mid = path.stem
        req = urllib.request.Request(f"{self.url}/v1/methods/{mid}", data=path.read_bytes(),
                                     method="PUT", headers={
                                         "Authorization": f"Bearer {token}",
                                         "Content-Type": "application/yaml"})
        with urllib.request.urlopen(req, timeout=10) as r:
            assert r.status in (200, 201)
        return mid

    def get(self, path, raw=False):
        with urllib.request.urlopen(self.url + path, timeout=10) as r:
            body = r.read()
        return body if raw else json.loads(body)

    def control(self, line):
        with socket.socket(socket.AF_UNIX) as s:
            s.settimeout(10)
            s.connect(str(self.ctl))
            s.sendall((line + "\n").encode())
            reply = s.makefile().readline().strip()
        assert reply == "ok", f"control {line!r}: {reply}"

    def fresh_beaker(self):
        """A new sample in the beaker, as an operator would put one there."""
        self.control(f"load {self.cider}")

    def calibrate(self):
        """`stopcock calibrate`, answering each prompt after putting the
        simulated electrode into that buffer. Returns (exit status, output)."""
        buffers = buffer_scenarios(self.tmp)
        p = subprocess.Popen([binary("stopcock"), "calibrate", "--station", "sim1", "--buffers",
                              ",".join(BUFFERS)], stdin=subprocess.PIPE,
                             stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
                             env=self.env)
        out = []
        for line in p.stdout:
            out.append(line)
            m = re.match(r"Put the electrode in buffer (\S+) and press Enter$", line.strip())
            if m:
                self.control(f"load {buffers[m.group(1)]}")
                p.stdin.write("\n")
                p.stdin.flush()
        p.stdin.close()
        return p.wait(timeout=120), "".join(out)

    def run_state(self, run):
        return self.get(f"/v1/runs/{run}")["state"]

    def wait_state(self, run, states, timeout_s=30):
        deadline = time.monotonic() + timeout_s
        while (s := self.run_state(run)) not in states:
            assert time.monotonic() < deadline, f"run {run} still {s}"
            time.sleep(0.2)
        return s

    def stop(self):
        for p in (self.daemon, self.sim):
            if p.poll() is None:
                p.send_signal(signal.SIGTERM)
                try:
                    p.wait(timeout=10)
                except subprocess.TimeoutExpired:
                    p.kill()
                    p.wait()
        self.sim.stdout.close()
        self.sim_log.close()
        self.daemon_log.close()


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    b = Bench(tmp_path_factory.mktemp("cli"))
    yield b
    b.stop()


@pytest.fixture(scope="module")
def calibrated(bench):
    """The cider method reads pH and the simulated transmitter gives mV only:
    the electrode is calibrated once, through the client."""
    rc, out = bench.calibrate()
    return bench, rc, out


def test_calibrate(calibrated):
    bench, rc, out = calibrated
    assert rc == 0, out
    cal = bench.get("/v1/calibrations/latest?station=sim1")
    assert cal["state"] == "accepted"
    assert out.count("Put the electrode in buffer") == 3
    for b in cal["buffers"]:
        assert f"buffer {b['nominal']:.2f}: {b['mv']:.1f} mV" in out
    assert f"slope   {cal['slope_pct']:.1f} % of the Nernst slope" in out
    assert f"offset  {cal['offset_mv']:.1f} mV at pH 7" in out
    assert "verdict accepted" in out
    # The live reading while a buffer settles: mV and how far it moved, once a
    # second at most (a line every 5 s off a terminal), never the same second twice.
    live = [l for l in out.splitlines() if l.startswith("buffer ") and " mV, moved " in l]
    assert live, out
    stamps = [(l.split(":")[0], l.rsplit(";", 1)[1].strip()) for l in live]
    assert len(stamps) == len(set(stamps)), live
    # The buffer table: a header with units, then one aligned row per buffer.
    lines = out.splitlines()
    h = next(i for i, l in enumerate(lines) if l.strip().startswith("buffer  pH at T"))
    rows = lines[h + 1:h + 1 + len(cal["buffers"])]
    assert len({len(r) for r in rows}) == 1, rows
    for r, b in zip(rows, cal["buffers"]):
        assert r.split()[0] == f"{b['nominal']:.2f}" and f"{b['mv']:.1f}" in r.split(), r


def start(bench, sample="ORCHARD-LANE-0412", amount=2, beaker=None):
    if beaker:
        bench.control(f"load {beaker}")
    else:
        bench.fresh_beaker()
    r = cli("start", "--station", "sim1", "--method", bench.method, "--sample-id", sample,
            "--amount", amount, env=bench.env)
    assert r.returncode == 0, r.stderr
    assert re.fullmatch(r"[1-9][0-9]*\n", r.stdout), r.stdout
    return int(r.stdout)


@pytest.fixture(scope="module")
def finished(bench, calibrated):
    """One whole run: (run id, the `wait` result)."""
    run = start(bench)
    w = cli("wait", run, "--timeout", 180, env=bench.env, timeout=200)
    return run, w


# ------------------------------------------------------------ no daemon needed


@pytest.mark.parametrize("args", [
    ["start"],
    ["start", "--station", "sim1", "--method", "m", "--sample-id", "x"],
    ["start", "--station", "sim1", "--method", "m", "--sample-id", "x", "--amount", "ten"],
    ["start", "--station", "sim1", "--method", "m", "--sample-id", "x", "--amount", "-1"],
    ["show"], ["show", "abc"], ["show", "0"], ["show", "1", "2"], ["show", "1", "--bogus"],
    ["wait", "1", "--timeout", "soon"], ["wait"], ["abort"], ["abort", "-3"],
    ["halt"], ["halt", "extra", "--station", "sim1"], ["status", "extra"],
    ["calibrate", "--station", "sim1"], ["calibrate", "--station", "sim1", "--buffers", "4,x"],
    ["calibrate", "--station", "sim1", "--buffers", "4.01,15"],
    ["status", "--url", "https://127.0.0.1:1"], ["status", "--url", "127.0.0.1:8470"],
    ["status", "--url"],
    ["titrants", "extra"], ["events", "--after", "x"], ["events", "--after", "-1"],
    ["events", "--limit", "0"], ["events", "--limit", "1001"], ["events", "extra"],
])
def test_bad_arguments_exit_2(args):
    r = cli(*args, env=dict(os.environ, STOPCOCK_URL="http://127.0.0.1:9"))
    assert r.returncode == 2, (args, r.stdout, r.stderr)
    assert r.stderr.startswith(f"stopcock {args[0]}: "), r.stderr


def test_unreadable_token_file_exits_2():
    r = cli("abort", "1", "--url", "http://127.0.0.1:9", "--token-file", "/nonexistent/token")
    assert r.returncode == 2
    assert "cannot read the token file /nonexistent/token" in r.stderr


def test_daemon_down_is_a_plain_message():
    port = free_port()  # bound and closed again: nobody listens there now
    url = f"http://127.0.0.1:{port}"
    for args in (["status"], ["show", "1"], ["start", "--station", "s", "--method", "m",
                                              "--sample-id", "x", "--amount", "1"]):
        t0 = time.monotonic()
        r = cli(*args, "--url", url)
        assert r.returncode == 1, r
        assert r.stderr.strip() == (f"stopcock {args[0]}: cannot reach stopcockd at {url}: "
                                    "connection refused — is it running?")
        assert time.monotonic() - t0 < 5
    t0 = time.monotonic()
    r = cli("wait", "1", "--url", url)  # down from the start: no waiting for it
    assert r.returncode == 1 and "connection refused" in r.stderr
    assert time.monotonic() - t0 < 5


def test_hung_daemon_hits_the_deadline():
    """A server that accepts and never answers: the client gives up, it does not hang."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        s.listen(4)
        url = "http://127.0.0.1:%d" % s.getsockname()[1]
        t0 = time.monotonic()
        r = cli("status", "--url", url, timeout=30)
        took = time.monotonic() - t0
    assert r.returncode == 1
    assert "did not answer in 10.0 s" in r.stderr, r.stderr
    assert 9 < took < 20


# ------------------------------------------------------------ against the bench


def test_status_shows_the_station(bench):
    r = cli("status", env=bench.env)
    assert r.returncode == 0, r.stderr
    lines = r.stdout.splitlines()
    assert lines[0].split()[:3] == ["STATION", "STATE", "PHASE"]
    row = next(l for l in lines[1:] if l.split()[0] == "sim1")
    stations = bench.get("/v1/stations")
    if isinstance(stations, dict):
        stations = stations["stations"]
    st = next(s for s in stations if s["name"] == "sim1")
    assert row.split()[1] == st["state"]
    cap = st["burette"]["capacity_ml"]
    held = st["burette"]["contents_ml"]
    # The syringe's content and the run's volume apart (a full syringe is not 0 mL).
    assert lines[0].split()[-3:] == ["DISPENSED", "SYRINGE", "RUN"], lines[0]
    assert f"{held:.3f} / {cap:.3f} mL" in row, (row, st["burette"])


def test_whole_run_wait_and_show(bench, finished):
    run, w = finished
    rec = bench.get(f"/v1/runs/{run}")
    assert rec["state"] == "finished", (w.stderr, rec)
    # wait exits 1 for a finished run whose results are doubtful (the quick
    # method's coarse steps can leave too few points on the jump), else 0.
    doubtful = any(r["accept"] == "doubtful" for r in rec["results"])
    assert w.returncode == (1 if doubtful else 0), (w.stderr, rec["endpoints"])
    # progress: one line per change when stderr is not a terminal
    progress = [l for l in w.stderr.splitlines() if l.startswith(f"run {run} ")]
    assert len(progress) >= 3, w.stderr
    assert any("running/dosing" in l for l in progress)
    adds = [int(m.group(1)) for l in progress if (m := re.search(r"additions (\d+)", l))]
    assert adds == sorted(adds) and adds[-1] > adds[0]
    assert len(progress) == len(set(progress)), "a line repeated without a change"
    # the summary on stdout names the endpoint the record holds
    ep = rec["endpoints"][0]
    assert w.stdout.startswith(f"run {run} finished")
    assert f"E1 {ep['volume_ml']:.4f} mL" in w.stdout

    s = cli("show", run, env=bench.env)
    assert s.returncode == 0, s.stderr
    out = s.stdout
    assert out.startswith(f"run {run}  finished\n")
    assert "ORCHARD-LANE-0412" in out and "cli-quick, revision 1" in out
    line = next(l for l in out.splitlines() if l.strip().startswith("E1 "))
    assert f"{ep['volume_ml']:.4f} mL" in line
    if ep.get("u_volume_ml") is not None:
        assert f"(u {ep['u_volume_ml']:.4f} mL)" in line
    if ep.get("ph") is not None:
        assert f"pH {ep['ph']:.2f}" in line
    res = rec["results"][0]
    rline = next(l for l in out.splitlines() if l.strip().startswith(res["name"]))
    assert res["unit"] in rline and rline.rstrip().split()[-1].strip("()") in (
        res["accept"], res.get("note", "").split()[-1] if res.get("note") else res["accept"])
    assert f"stop reason  {rec['stop_reason']}" in out


def test_show_csv_matches_points(bench, finished):
    run, _ = finished
    r = cli("show", run, "--csv", env=bench.env)
    assert r.returncode == 0, r.stderr
    assert r.stdout.encode() == bench.get(f"/v1/runs/{run}/points?format=csv", raw=True)
    rows = r.stdout.strip().splitlines()
    header = rows[0].split(",")
    for field in ("t_s", "volume_ml", "mv", "ph", "dpdv"):
        assert field in header
    pts = bench.get(f"/v1/runs/{run}/points")
    pts = pts if isinstance(pts, list) else pts["points"]
    assert len(rows) - 1 == len(pts) > 5


def test_show_svg_writes_the_curve(bench, finished, tmp_path):
    run, _ = finished
    f = tmp_path / "curve.svg"
    r = cli("show", run, "--svg", f, env=bench.env)
    assert r.returncode == 0, r.stderr
    assert f"written to {f}" in r.stderr
    data = f.read_bytes()
    assert data == bench.get(f"/v1/runs/{run}/curve.svg", raw=True)
    root = ET.fromstring(data)  # well-formed XML
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    ep = bench.get(f"/v1/runs/{run}")["endpoints"][0]
    assert f"{ep['volume_ml']:.3f} mL".encode() in data
    assert b"titrant added (mL)" in data
    assert not list(tmp_path.glob("curve.svg.tmp*")), "temporary file left behind"
    # --svg - : the SVG alone on stdout
    r = cli("show", run, "--svg", "-", env=bench.env)
    assert r.returncode == 0 and r.stdout.encode() == data


def test_abort_a_run(bench, calibrated):
    run = start(bench, sample="ORCHARD-LANE-0413")
    bench.wait_state(run, {"running"})
    r = cli("abort", run, env=bench.env)
    assert r.returncode == 0, r.stderr
    assert r.stdout.startswith(f"run {run} ")
    w = cli("wait", run, "--timeout", 30, env=bench.env)
    assert w.returncode == 1
    assert w.stdout.startswith(f"run {run} aborted")
    assert bench.run_state(run) == "aborted"
    # a second abort of a finished run is the daemon's 409, shown plainly
    r = cli("abort", run, env=bench.env)
    assert r.returncode == 1 and "HTTP 409" in r.stderr, r.stderr


def test_halt_a_station(bench, calibrated):
    run = start(bench, sample="ORCHARD-LANE-0414")
    bench.wait_state(run, {"running"})
    r = cli("halt", "--station", "sim1", env=bench.env)
    assert r.returncode == 0, r.stderr
    assert r.stdout == "station sim1 halted\n"
    assert bench.wait_state(run, {"aborted", "failed", "finished"}) == "aborted"


def test_wait_timeout_and_unknown_run(bench, calibrated):
    run = start(bench, sample="ORCHARD-LANE-0415")
    t0 = time.monotonic()
    w = cli("wait", run, "--timeout", 1, env=bench.env)
    assert w.returncode == 1
    assert f"run {run} has not ended after 1 s" in w.stderr
    assert time.monotonic() - t0 < 5
    assert cli("abort", run, env=bench.env).returncode == 0
    bench.wait_state(run, {"aborted"})

    r = cli("show", 999999, env=bench.env)
    assert r.returncode == 1 and "HTTP 404" in r.stderr, r.stderr
    r = cli("wait", 999999, env=bench.env)
    assert r.returncode == 1 and "there is no run 999999" in r.stderr


def test_writes_need_the_token(bench, tmp_path):
    env = dict(bench.env)
    del env["STOPCOCK_TOKEN_FILE"]
    r = cli("halt", "--station", "sim1", env=env)
    assert r.returncode == 1
    assert "HTTP 401" in r.stderr and "--token-file" in r.stderr, r.stderr
    wrong = tmp_path / "wrong"
    wrong.write_text("lab:not-the-token\n")
    r = cli("halt", "--station", "sim1", "--token-file", wrong, env=env)
    assert r.returncode == 1
    assert "HTTP 401" in r.stderr and "token was refused" in r.stderr, r.stderr


def test_curl_and_client_agree(bench, finished):
    """The LIMS page's curl commands give what the client shows."""
    run, _ = finished
    out = subprocess.run(["curl", "-fsS", f"{bench.url}/v1/results?after=0&limit=100"],
                         capture_output=True, text=True, timeout=30)
    assert out.returncode == 0, out.stderr
    feed = json.loads(out.stdout)
    ids = [r["id"] for r in feed["results"]]
    assert run in ids
    seqs = [r["seq"] for r in feed["results"]]
    assert seqs == sorted(seqs) and len(set(seqs)) == len(seqs)
    assert feed["next_after"] == seqs[-1]


def lims_poller(tmp_path):
    """The poller script of docs/lims.md, exactly as printed there."""
    text = (ROOT / "docs" / "lims.md").read_text()
    m = re.search(r"```sh\n(#!/bin/sh\n# lims-poll:.*?)```", text, re.S)
    assert m, "docs/lims.md has no lims-poll script"
    p = tmp_path / "lims-poll"
    p.write_text(m.group(1))
    return p


def test_lims_poller_from_the_docs(bench, finished, tmp_path):
    """docs/lims.md's poller files each ended run once, in feed order, and moves
    its cursor; a second call finds nothing new."""
    poller = lims_poller(tmp_path)
    env = dict(os.environ, STOPCOCK_URL=bench.url, LIMS_CURSOR=str(tmp_path / "cursor"))
    first = subprocess.run(["sh", str(poller)], capture_output=True, text=True, env=env,
                           timeout=60)
    assert first.returncode == 0, first.stderr
    rows = [l.split("\t") for l in first.stdout.splitlines()]
    feed = bench.get("/v1/results?after=0&limit=1000")["results"]
    assert [int(r[0]) for r in rows] == [r["seq"] for r in feed]
    assert [int(r[1]) for r in rows] == [r["id"] for r in feed]
    assert [r[3] for r in rows] == [r["state"] for r in feed]
    run, _ = finished
    assert rows[[int(r[1]) for r in rows].index(run)][2] == "ORCHARD-LANE-0412"
    assert (tmp_path / "cursor").read_text().strip() == str(feed[-1]["seq"])
    again = subprocess.run(["sh", str(poller)], capture_output=True, text=True, env=env,
                           timeout=60)
    assert again.returncode == 0 and again.stdout == "", again


# ------------------------------------------------ what "finished" means (docs/lims.md)


def test_no_endpoint_is_failed_and_wait_exits_1(bench, calibrated):
    # A beaker with no acid (tests/data/scenarios/alkaline-rinse.yaml): the run stops
    # on its own rules with no endpoint. Before, it ended `finished`, the result
    # null with accept "none", and `wait` exited 0.
    run = start(bench, sample="ORCHARD-RINSE-1",
                beaker=ROOT / "tests" / "data" / "scenarios" / "alkaline-rinse.yaml")
    w = cli("wait", run, "--timeout", 180, env=bench.env, timeout=200)
    rec = bench.get(f"/v1/runs/{run}")
    assert rec["state"] == "failed", rec
    assert w.returncode == 1, (w.stdout, w.stderr)
    assert rec["stop_reason"] in ("volume_max", "signal_limit"), rec["stop_reason"]
    codes = [f["code"] for f in rec["faults"]]
    assert codes == ["endpoint_missing"], rec["faults"]
    assert "found 0 of the 1 endpoint" in rec["faults"][0]["message"]
    assert [r["accept"] for r in rec["results"]] == ["missing"]
    assert rec["results"][0]["value"] is None
    pts = bench.get(f"/v1/runs/{run}/points")["points"]
    assert len(pts) >= 3 and pts[-1]["volume_ml"] == pytest.approx(rec["dispensed_ml"], abs=0.002)
    s = cli("show", run, env=bench.env)
    assert "missing" in s.stdout and "endpoint_missing" in s.stdout, s.stdout
    bench.fresh_beaker()


def test_out_of_limits_finishes_and_wait_exits_3(bench, calibrated):
    # The same beaker reported as 50 mL of sample instead of 2 mL: the result
    # is 25 times smaller and below the method's 2.0 g/L. Finished (nothing
    # went wrong) but not a pass, so `wait` exits 3 (docs/cli.md, "Exit status").
    run = start(bench, sample="ORCHARD-LANE-0499", amount=50)
    w = cli("wait", run, "--timeout", 180, env=bench.env, timeout=200)
    rec = bench.get(f"/v1/runs/{run}")
    assert rec["state"] == "finished", rec
    assert rec["results"][0]["accept"] == "low", rec["results"]
    assert w.returncode == 3, (w.stdout, w.stderr)


def test_start_with_a_misspelt_method_names_the_near_one(bench):
    # As `stopcock check` does for keys: the daemon's 404 names the near method.
    r = cli("start", "--station", "sim1", "--method", "cli-quik", "--sample-id", "X",
            "--amount", 2, env=bench.env)
    assert r.returncode == 1
    assert "no method 'cli-quik'; did you mean 'cli-quick'?" in r.stderr, r.stderr
