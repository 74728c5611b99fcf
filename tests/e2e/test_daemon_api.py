"""stopcockd's HTTP API against a real daemon on the simulated bench: health,
stations, authentication, errors and their statuses, body limits, method
revisions, metrics, and --check-config. Runs are in test_daemon_runs.py."""
import json
import signal
import socket
import subprocess
import time

import pytest

import daemon_bench as db


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    b = db.Bench(tmp_path_factory.mktemp("api"))
    yield b
    b.close()


def error_of(r):
    j = r.json()
    assert set(j) == {"error"} and set(j["error"]) == {"code", "message"}, j
    assert r.headers["Content-Type"].startswith("application/json")
    return j["error"]


def test_health(bench):
    h = bench.get("/v1/health")
    assert h["status"] == "ok"
    assert h["version"]
    assert h["uptime_s"] >= 0


def test_stations_show_live_reading_and_burette(bench):
    s = bench.station()
    assert s["state"] == "idle"
    assert s["run"] is None
    assert s["burette"]["capacity_ml"] == 10.0      # the simulator's syringe
    assert s["vessel_max_ml"] == 150.0
    sim = bench.sim_state()
    # The live reading is the transmitter's mV (the sim's electrode reading).
    assert s["reading"]["mv"] == pytest.approx(sim["mv"], abs=5.0)
    assert s["reading"]["age_s"] < 5.0


def test_listens_on_loopback_only(bench):
    # The simulator's config names 127.0.0.1; nothing answers on another address.
    addrs = {a[4][0] for a in socket.getaddrinfo(socket.gethostname(), None, socket.AF_INET)}
    addrs.discard("127.0.0.1")
    for a in addrs:
        with socket.socket() as s:
            s.settimeout(1)
            assert s.connect_ex((a, bench.port)) != 0, f"answers on {a}"


@pytest.mark.parametrize("method,path,body", [
    ("POST", "/v1/runs", '{"station":"sim1","method":"wash-acid-mv","sample_id":"x","amount":10}'),
    ("PUT", "/v1/methods/wash-acid-mv", "method: x\n"),
    ("POST", "/v1/stations/sim1/halt", ""),
    ("POST", "/v1/runs/1/abort", ""),
    ("POST", "/v1/calibrations", '{"station":"sim1","buffers":[4.01,7.00]}'),
])
def test_writes_need_a_valid_token(bench, method, path, body):
    r = bench.request(method, path, body)
    assert r.status == 401
    assert error_of(r)["code"] == "no_token"
    assert r.headers["WWW-Authenticate"].startswith("Bearer")
    r = bench.request(method, path, body, token=bench.token[:-1] + "x")
    assert r.status == 401
    assert error_of(r)["code"] == "bad_token"
    r = bench.request(method, path, body, token=bench.token + "x")   # a longer one
    assert r.status == 401


def test_curl_without_token_gets_401(bench):
    out = subprocess.run(["curl", "-s", "-o", "/dev/null", "-w", "%{http_code}", "-X", "POST",
                          "-d", "{}", bench.url + "/v1/runs"],
                         capture_output=True, text=True, timeout=20)
    assert out.stdout == "401"


@pytest.mark.parametrize("body", ['{"station":', "not json", "[1,2]", "",
                                  '{"station":"sim1","station":"sim1","method":"m",'
                                  '"sample_id":"s","amount":1}',
                                  '{"station":"sim1","method":"m","sample_id":"s"}',
                                  '{"station":"sim1","method":"m","sample_id":"s","amount":"1"}',
                                  '{"station":"sim1","method":"m","sample_id":"s","amount":1,'
                                  '"extra":true}'])
def test_malformed_run_request_is_400(bench, body):
    r = bench.write("POST", "/v1/runs", body)
    assert r.status == 400, r.body
    error_of(r)


def test_unknown_things_are_404(bench):
    assert bench.request("GET", "/v1/runs/999999").status == 404
    assert error_of(bench.request("GET", "/v1/runs/999999"))["code"] == "not_found"
    assert bench.request("GET", "/v1/runs/999999/points").status == 404
    assert bench.request("GET", "/v1/runs/999999/curve.svg").status == 404
    assert bench.write("POST", "/v1/runs/999999/abort").status == 404
    assert bench.request("GET", "/v1/methods/no-such-method").status == 404
    assert bench.request("GET", "/v1/nowhere").status == 404
    assert bench.write("POST", "/v1/stations/nope/halt").status == 404
    r = bench.write("POST", "/v1/runs", json.dumps(
        {"station": "nope", "method": "wash-acid-mv", "sample_id": "s", "amount": 10}))
    assert r.status == 404
    r = bench.write("POST", "/v1/runs", json.dumps(
        {"station": "sim1", "method": "no-such-method", "sample_id": "s", "amount": 10}))
    assert r.status == 404


def test_bad_ids_are_400(bench):
    for p in ("/v1/runs/abc", "/v1/runs/-1", "/v1/runs/0", "/v1/calibrations/x"):
        assert bench.request("GET", p).status == 400, p


def test_wrong_verb_is_405(bench):
    r = bench.request("DELETE", "/v1/runs/1", token=bench.token)
    assert r.status == 405
    error_of(r)


def test_body_over_the_limit_is_413(bench):
    big = "x" * (256 * 1024 + 1)      # http.max_body_bytes defaults to 256 KiB
    r = bench.write("PUT", "/v1/methods/wash-acid-mv", big)
    assert r.status == 413
    assert error_of(r)["code"] == "too_large"


def test_chunked_body_is_refused_with_411(bench, tmp_path):
    # A chunk's declared size is out of the application's sight in
    # libmicrohttpd 0.9.75, so chunked bodies are refused before any is read.
    # curl waits for that answer before sending (Expect: 100-continue): a
    # client still sending when the daemon closes may see a reset instead of
    # the 411, which is a race of the client's, not the daemon's answer.
    f = tmp_path / "big"
    f.write_bytes(b"y" * (300 * 1024))
    out = subprocess.run(["curl", "-s", "-o", "/dev/null", "-w", "%{http_code}", "-X", "PUT",
                          "-H", f"Authorization: Bearer {bench.token}",
                          "-H", "Expect: 100-continue", "--expect100-timeout", "10",
                          "-H", "Transfer-Encoding: chunked", "--data-binary", f"@{f}",
                          bench.url + "/v1/methods/wash-acid-mv"],
                         capture_output=True, text=True, timeout=20)
    assert out.stdout == "411"


def test_method_revisions(bench):
    text = db.METHOD_MV.read_text()
    r = bench.write("PUT", "/v1/methods/wash-acid-mv", text)
    assert r.status in (200, 201)
    m = bench.get("/v1/methods/wash-acid-mv")
    assert m["text"] == text
    assert m["revision"] == 1
    assert len(m["sha256"]) == 64
    # The same text again: unchanged, 200.
    assert bench.write("PUT", "/v1/methods/wash-acid-mv", text).status == 200
    # Changed text at the same revision: 409, nothing stored.
    r = bench.write("PUT", "/v1/methods/wash-acid-mv", text.replace("step_aim: 25", "step_aim: 20"))
    assert r.status == 409
    assert "revision" in error_of(r)["message"]
    # A raised revision is stored; the old one is kept too.
    r2 = text.replace("revision: 1", "revision: 2")
    r = bench.write("PUT", "/v1/methods/wash-acid-mv", r2)
    assert r.status == 201
    assert r.json()["revision"] == 2
    m = bench.get("/v1/methods/wash-acid-mv")
    assert m["revision"] == 2 and m["revisions_stored"] == 2 and m["text"] == r2
    listed = {x["id"]: x for x in bench.get("/v1/methods")["methods"]}
    assert listed["wash-acid-mv"]["revision"] == 2
    # Methods of methods_dir (config/methods) were loaded at start.
    assert "cider-acidity" in listed


def test_invalid_method_is_422_with_positions(bench):
    text = db.METHOD_MV.read_text().replace("revision: 1", "revision: 9").replace(
        "dose_min_ml: 0.02", "dose_min_ml: -0.1")
    r = bench.write("PUT", "/v1/methods/wash-acid-mv", text)
    assert r.status == 422
    msg = error_of(r)["message"]
    line = next(i + 1 for i, l in enumerate(text.splitlines()) if "dose_min_ml" in l)
    assert f"wash-acid-mv.yaml:{line}:" in msg, msg
    # method: must equal the id in the path
    r = bench.write("PUT", "/v1/methods/other-name", db.METHOD_MV.read_text())
    assert r.status == 422
    # above the station's vessel (150 mL)
    r = bench.write("PUT", "/v1/methods/wash-acid-mv", text.replace(
        "dose_min_ml: -0.1", "dose_min_ml: 0.02").replace("volume_max_ml: 5.0",
                                                          "volume_max_ml: 500.0"))
    assert r.status == 422
    assert "vessel_max_ml" in error_of(r)["message"]


def test_ph_method_without_calibration_is_409(bench):
    # The simulated transmitter gives mV only, and nobody calibrated sim1.
    r = bench.write("POST", "/v1/runs", json.dumps(
        {"station": "sim1", "method": "cider-acidity", "sample_id": "s", "amount": 10}))
    assert r.status == 409
    assert "calibrat" in error_of(r)["message"]


def test_amount_outside_the_method_range_is_400(bench):
    bench.write("PUT", "/v1/methods/wash-acid-mv", db.METHOD_MV.read_text())  # may be 409
    r = bench.write("POST", "/v1/runs", json.dumps(
        {"station": "sim1", "method": "wash-acid-mv", "sample_id": "s", "amount": 500}))
    assert r.status == 400


def test_results_feed_parameters(bench):
    page = bench.get("/v1/results?after=0&limit=5")
    assert set(page) == {"results", "next_after", "history"}
    assert bench.request("GET", "/v1/results?after=x").status == 400
    assert bench.request("GET", "/v1/results?limit=0").status == 400
    assert bench.request("GET", "/v1/results?limit=5000").status == 400


def test_metrics(bench):
    r = bench.request("GET", "/metrics")
    assert r.status == 200
    text = r.body.decode()
    assert r.headers["Content-Type"].startswith("application/openmetrics-text")
    assert text.endswith("# EOF\n")
    assert 'stopcock_runs{state="finished"}' in text
    assert 'stopcock_additions_total{station="sim1"}' in text
    assert 'stopcock_reading_age_seconds{station="sim1"}' in text
    assert "stopcock_http_requests_total" in text


def test_no_cors_headers(bench):
    r = bench.request("GET", "/v1/health", headers={"Origin": "http://example.org"})
    assert not any(k.lower().startswith("access-control") for k in r.headers.keys())


def check_config(path):
    return subprocess.run([db.binary("stopcockd"), "--check-config", "-c", str(path)],
                          capture_output=True, text=True, timeout=20)


def test_check_config_good(bench):
    r = check_config(bench.config)
    assert r.returncode == 0, r.stderr


def test_check_config_reports_every_error_with_position(bench, tmp_path):
    text = bench.config.read_text()
    bad = (text.replace("listen: 127.0.0.1:", "listen: localhost:")
               .replace("vessel_max_ml: 150", "vessel_max_ml: -3")
               .replace("read_needs_token: false", "read_needs_token: false\n  max_conections: 4"))
    p = tmp_path / "bad.yaml"
    p.write_text(bad)
    r = check_config(p)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    lines_of = {l.split(":")[1] for l in lines if l.startswith(str(p) + ":")}
    src = bad.splitlines()
    want = {str(i + 1) for i, l in enumerate(src)
            if "localhost:" in l or "vessel_max_ml: -3" in l or "max_conections" in l}
    assert want <= lines_of, r.stderr
    assert "max_connections" in r.stderr           # did you mean
    # A driver's own keys are checked by the driver (burette: unknown key).
    p2 = tmp_path / "bad2.yaml"
    p2.write_text(text.replace("baud: 9600", "baud: 9600\n      bogus_key: 1"))
    r = check_config(p2)
    assert r.returncode == 2 and "bogus_key" in r.stderr, r.stderr
    assert r.stderr.startswith(str(p2) + ":")


def test_daemon_refuses_a_bad_config(tmp_path):
    p = tmp_path / "c.yaml"
    p.write_text("http: {listen: 127.0.0.1:1}\nstations: []\n")
    r = subprocess.run([db.binary("stopcockd"), "-c", str(p)], capture_output=True, text=True,
                       timeout=20)
    assert r.returncode == 2
    assert r.stderr.startswith(f"{p}:2:")


def test_sighup_reloads_methods_dir(bench, tmp_path):
    # Last in this file: it restarts the daemon with its own methods_dir.
    mdir = tmp_path / "methods"
    mdir.mkdir()
    text = bench.config.read_text()
    line = next(l for l in text.splitlines() if l.startswith("methods_dir:"))
    bench.config.write_text(text.replace(line, f"methods_dir: {mdir}"))
    assert bench.stop_daemon() == 0
    bench.start_daemon()
    assert bench.request("GET", "/v1/methods/hup-test").status == 404
    src = db.METHOD_MV.read_text().replace("method: wash-acid-mv", "method: hup-test")
    (mdir / "hup-test.yaml").write_text(src)
    bench.daemon.send_signal(signal.SIGHUP)
    deadline = time.monotonic() + 10
    while bench.request("GET", "/v1/methods/hup-test").status != 200:
        assert time.monotonic() < deadline, "SIGHUP did not load hup-test.yaml"
        time.sleep(0.1)
    m = bench.get("/v1/methods/hup-test")
    assert m["source"] == "file" and m["text"] == src and m["revision"] == 1
    # A bad file is reported in the log and changes nothing.
    (mdir / "hup-test.yaml").write_text(src.replace("revision: 1", "revision: 2")
                                        .replace("step_aim: 25", "step_aim: -1"))
    bench.daemon.send_signal(signal.SIGHUP)
    time.sleep(0.5)
    assert bench.get("/v1/methods/hup-test")["revision"] == 1
    assert bench.get("/v1/health")["status"] == "ok"
    # --check-config names the bad method file; the daemon itself still starts.
    r = check_config(bench.config)
    assert r.returncode == 2 and f"{mdir}/hup-test.yaml:" in r.stderr, r.stderr
    assert bench.stop_daemon() == 0
    bench.start_daemon()
    assert bench.get("/v1/methods/hup-test")["revision"] == 1


def test_sighup_reloads_tokens(bench):
    path = bench.tmp / "token"
    old = bench.token
    new = "rotated-" + old[::-1]
    path.write_text(f"lims:{new}\n")
    bench.daemon.send_signal(signal.SIGHUP)
    deadline = time.monotonic() + 10
    while bench.request("POST", "/v1/stations/sim1/halt", token=new).status != 200:
        assert time.monotonic() < deadline, "SIGHUP did not load the new token"
        time.sleep(0.1)
    assert bench.request("POST", "/v1/stations/sim1/halt", token=old).status == 401
    bench.token = new


def test_read_token_and_connection_limits(bench):
    # Restarts the daemon with reads needing a token and two connections per client.
    text = bench.config.read_text()
    bench.config.write_text(text.replace("read_needs_token: false",
                                         "read_needs_token: true\n  max_per_ip: 2"))
    assert bench.stop_daemon() == 0
    try:
        bench.daemon = db.subprocess.Popen([db.binary("stopcockd"), "-c", str(bench.config)],
                                           stdout=bench.daemon_log, stderr=bench.daemon_log)
        deadline = time.monotonic() + 15
        while True:
            try:
                if bench.request("GET", "/v1/health").status == 200:
                    break
            except OSError:
                pass
            assert time.monotonic() < deadline
            time.sleep(0.05)
        def status(path, **kw):
            # With max_per_ip 2, the connection of the request before may not
            # be closed on the daemon's side yet on a loaded machine: a 503
            # (busy) here is that limit, not an answer about the token.
            t_end = time.monotonic() + 5
            while True:
                st = bench.request("GET", path, **kw).status
                if st != 503 or time.monotonic() > t_end:
                    return st
                time.sleep(0.2)

        # health stays open for probes; everything else needs the token now
        assert status("/v1/stations") == 401
        assert status("/v1/stations", token=bench.token) == 200
        assert status("/metrics") == 401
        # Two idle connections are held open; a third from the same address is
        # answered 503 (busy). On a loaded machine the daemon may not have
        # accepted the held pair yet when the third arrives; give it up to
        # three tries.
        refused = None
        for _ in range(3):
            held = [socket.create_connection(("127.0.0.1", bench.port), timeout=5)
                    for _ in range(2)]
            time.sleep(0.5)
            r = bench.request("GET", "/v1/health", timeout=5)
            for s in held:
                s.close()
            if r.status == 503:
                refused = r
                break
            time.sleep(0.3)
        assert refused, "a third connection from one address was not refused"
        assert error_of(refused)["code"] == "busy"
        assert refused.headers["Retry-After"] == "1"
        time.sleep(0.3)
        assert status("/v1/health") == 200
    finally:
        bench.config.write_text(text)
