"""Publishing to MQTT (docs/mqtt.md) against a real broker: each test starts
Debian's mosquitto on a free loopback port with a config it writes, and
subscribes with paho-mqtt. One simulated bench and daemon serve the module;
the tests change the daemon's mqtt: section and restart it where they must.

What is checked: a run's record on <prefix>/results equals GET /v1/runs/{id}
and the retained station state follows the run; a finished series on
<prefix>/series equals GET /v1/series/{id}; `offline` appears when the
daemon is killed; with the broker killed mid-run and restarted, or the daemon
killed while results wait in its outbox, every result arrives, in seq order,
none twice once repeats of (prefix, seq) are dropped; TLS with a certificate
the test makes; and --check-config errors at their lines."""
import json
import os
import subprocess
import time

import pytest
import yaml

import daemon_bench as db
from mqtt_bench import Broker, MqttBench, Sub, results_by_seq

BROKER_DOWN_S = float(os.environ.get("STOPCOCK_MQTT_OUTAGE_S", "3"))  # the outage


@pytest.fixture(scope="module")
def broker(tmp_path_factory):
    b = Broker(tmp_path_factory.mktemp("mqtt"))
    yield b
    b.close()


@pytest.fixture(scope="module")
def bench(tmp_path_factory, broker):
    b = MqttBench(tmp_path_factory.mktemp("bench"),
                  {"host": "127.0.0.1", "port": broker.port, "topic_prefix": "lab/b7",
                   "keepalive_s": 5})
    yield b
    b.close()


def test_a_run_end_to_end(bench, broker):
    sub = Sub(broker, "lab/b7/#", persistent=False)
    try:
        bench.fresh_beaker()
        rid = bench.fast_run("E2E-1")
        rec = bench.wait_state(rid, ("finished", "failed", "aborted"), timeout_s=60)
        sub.wait(lambda: results_by_seq(sub)[1], what="result")
        got, unique = results_by_seq(sub)
        assert len(unique) == 1
        # the very record of the HTTP API, seq included
        assert unique[0] == bench.run(rid) == rec
        assert unique[0]["seq"] is not None
        # the retained station state followed the run: running it, then not
        states = [json.loads(p) for p, _ in sub.of("lab/b7/stations/sim1")]
        assert any(s["state"] == "running" and s["run"] == rid for s in states), states
        sub.wait(lambda: json.loads(sub.of("lab/b7/stations/sim1")[-1][0])["run"] is None,
                 what="station state after the run")
        # the same JSON as GET /v1/stations (the reading's age aside)
        last = json.loads(sub.of("lab/b7/stations/sim1")[-1][0])
        http = bench.station()
        assert set(last) == set(http) and last["state"] == http["state"]
        # the audit trail: the run's start and end
        events = [json.loads(p) for p, _ in sub.of("lab/b7/events")]
        codes = [(e["kind"], e["code"], e["run_id"]) for e in events]
        assert ("run", "started", rid) in codes, codes
        assert bench.metric("stopcock_mqtt_connected") == 1
        sub.wait(lambda: bench.metric("stopcock_mqtt_outbox_messages") == 0,
                 what="an empty outbox")
    finally:
        sub.close()
    # A late subscriber gets the retained state and online.
    late = Sub(broker, "lab/b7/#", persistent=False)
    try:
        late.wait(lambda: late.of("lab/b7/status") and late.of("lab/b7/stations/sim1"),
                  what="retained messages")
        assert late.of("lab/b7/status")[0] == ("online", True)
        assert late.of("lab/b7/stations/sim1")[0][1] is True
        assert not late.of("lab/b7/results")  # results are not retained
    finally:
        late.close()


def test_a_finished_series_is_published(bench, broker):
    # Two beakers without a changer: the series waits before the second one
    # until the operator says `next` (docs/api.md, "Series").
    sub = Sub(broker, "lab/b7/series", persistent=False)
    try:
        bench.fresh_beaker()
        samples = [{"sample_id": f"SER-{i}", "method": "fast-acid-mv", "amount": 10.0}
                   for i in (1, 2)]
        r = bench.write("POST", "/v1/series",
                        json.dumps({"station": "sim1", "samples": samples,
                                    "on_failure": "continue"}))
        assert r.status == 201, r.body
        sid = r.json()["id"]
        deadline = time.monotonic() + 90
        while (s := bench.get(f"/v1/series/{sid}"))["state"] in ("queued", "running"):
            if s["waiting"]:
                bench.fresh_beaker()
                assert bench.write("POST", f"/v1/series/{sid}/next").status == 202
            assert time.monotonic() < deadline, s
            time.sleep(0.1)
        sub.wait(lambda: sub.of("lab/b7/series"), what="the series")
        time.sleep(0.5)  # a repeat, were there one, would be here by now
        got = [json.loads(p) for p, _ in sub.of("lab/b7/series")]
        # once, the very record of the HTTP API, its seq included
        assert got == [bench.get(f"/v1/series/{sid}")], got
        assert got[0]["seq"] is not None and got[0]["state"] == "finished", got[0]["detail"]
        assert [len(x["runs"]) for x in got[0]["samples"]] == [1, 1]
        sub.wait(lambda: bench.metric("stopcock_mqtt_outbox_messages") == 0,
                 what="an empty outbox")
    finally:
        sub.close()


def test_broker_killed_mid_run_loses_nothing(bench, broker):
    sub = Sub(broker, "lab/b7/results")
    try:
        before = bench.get("/v1/results?after=0&limit=1000")["next_after"]
        bench.fresh_beaker()
        rids = [bench.fast_run("OUTAGE-1")]
        bench.wait_points(rids[0], 2)
        # Stalled first: the connection stays up, so the first result is
        # sent into it and never acknowledged; then killed, which loses it
        # at the broker. Only a row kept until its PUBACK brings it back.
        broker.pause(True)
        down_at = time.monotonic()
        bench.wait_state(rids[0], ("finished", "failed", "aborted"), timeout_s=60)
        # the finished run waits in the outbox, and /metrics says so
        deadline = time.monotonic() + 10
        while (bench.metric("stopcock_mqtt_outbox_messages") or 0) < 1:
            assert time.monotonic() < deadline, "no backlog in /metrics"
            time.sleep(0.1)
        broker.kill()
        deadline = time.monotonic() + 10
        while bench.metric("stopcock_mqtt_connected") != 0:
            assert time.monotonic() < deadline, "the daemon did not see the broker go"
            time.sleep(0.1)
        # a second run, made while the broker is away, waits behind the first
        bench.fresh_beaker()
        rids.append(bench.fast_run("OUTAGE-2"))
        bench.wait_state(rids[1], ("finished", "failed", "aborted"), timeout_s=60)
        time.sleep(max(0.0, BROKER_DOWN_S - (time.monotonic() - down_at)))
        broker.start()
        up_at = time.monotonic()
        feed = bench.get(f"/v1/results?after={before}&limit=1000")["results"]
        want = [r["seq"] for r in feed]
        assert [r["id"] for r in feed][-2:] == rids
        sub.wait(lambda: [r["seq"] for r in results_by_seq(sub)[1]] == want, timeout_s=60,
                 what=f"results {want}")
        print(f"\nmqtt: broker down {up_at - down_at:.1f} s; every result in "
              f"{time.monotonic() - up_at:.1f} s after it came back")
        got, unique = results_by_seq(sub)
        # every result, once after de-duplication, in seq order, as the feed has it
        assert unique == feed
        assert [r["seq"] for r in got] == sorted(r["seq"] for r in got)
    finally:
        sub.close()
        broker.running()


def test_daemon_killed_with_results_in_the_outbox(bench, broker):
    # Killed while the broker is up: the last will says offline.
    status = Sub(broker, "lab/b7/status", persistent=False)
    try:
        status.wait(lambda: status.of("lab/b7/status"), what="status")
        bench.kill_daemon()
        status.wait(lambda: status.of("lab/b7/status")[-1][0] == "offline",
                    what="offline after the kill")
    finally:
        status.close()
    sub = Sub(broker, "lab/b7/results")
    try:
        broker.kill()
        bench.start_daemon()
        before = bench.get("/v1/results?after=0&limit=1000")["next_after"]
        bench.fresh_beaker()
        rid = bench.fast_run("KILLED-1")
        bench.wait_state(rid, ("finished", "failed", "aborted"), timeout_s=60)
        deadline = time.monotonic() + 10
        while (bench.metric("stopcock_mqtt_outbox_messages") or 0) < 1:
            assert time.monotonic() < deadline, "no backlog in /metrics"
            time.sleep(0.1)
        bench.kill_daemon()  # the result is only in the database's outbox now
        broker.start()
        bench.start_daemon()
        feed = bench.get(f"/v1/results?after={before}&limit=1000")["results"]
        assert [r["id"] for r in feed] == [rid]
        sub.wait(lambda: any(r["id"] == rid for r in results_by_seq(sub)[1]),
                 timeout_s=30, what="the result after the restart")
        got, unique = results_by_seq(sub)
        assert [r for r in unique if r["id"] == rid] == feed
    finally:
        sub.close()
        broker.running()


def make_cert(d):
    """A CA and a server certificate for 127.0.0.1, made with openssl."""
    def ssl(*args):
        r = subprocess.run(["openssl", *args], capture_output=True, text=True, cwd=d,
                           timeout=60)
        assert r.returncode == 0, r.stderr

    ssl("req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "2", "-subj",
        "/CN=stopcock test CA", "-keyout", "ca.key", "-out", "ca.pem")
    ssl("req", "-newkey", "rsa:2048", "-nodes", "-subj", "/CN=127.0.0.1", "-keyout",
        "server.key", "-out", "server.csr")
    (d / "san.ext").write_text("subjectAltName=IP:127.0.0.1\n")
    ssl("x509", "-req", "-in", "server.csr", "-CA", "ca.pem", "-CAkey", "ca.key",
        "-CAcreateserial", "-days", "2", "-extfile", "san.ext", "-out", "server.pem")
    return {"ca": d / "ca.pem", "cert": d / "server.pem", "key": d / "server.key"}


def test_tls_and_password_from_a_file(bench, tmp_path):
    tls = make_cert(tmp_path)
    password = "pw-" + "x7Rq9" * 4
    secure = Broker(tmp_path, "tls-broker", tls=tls, passwd=("bench7", password))
    pwfile = tmp_path / "mqtt-password"
    pwfile.write_text(password + "\n")
    sub = None
    try:
        bench.stop_daemon()
        bench.set_mqtt({"host": "127.0.0.1", "port": secure.port, "topic_prefix": "lab/tls",
                        "username": "bench7", "password_file": str(pwfile),
                        "tls": {"ca_file": str(tls["ca"])}})
        bench.start_daemon()
        sub = Sub(secure, "lab/tls/#", tls_ca=tls["ca"], auth=("bench7", password),
                  persistent=False)
        sub.wait(lambda: ("online", True) in sub.of("lab/tls/status"), what="online over TLS")
        sub.wait(lambda: sub.of("lab/tls/stations/sim1"), what="station over TLS")
        assert bench.metric("stopcock_mqtt_connected") == 1
        # the password is in no log line
        assert password not in (bench.tmp / "daemon.log").read_text()
    finally:
        if sub:
            sub.close()
        bench.stop_daemon()
        secure.close()
        bench.set_mqtt({"host": "127.0.0.1", "port": 1, "topic_prefix": "lab/none"})
        bench.start_daemon()


def test_check_config_reports_mqtt_errors_at_their_lines(bench, tmp_path):
    cfg = yaml.safe_load(bench.config.read_text())
    cfg.pop("mqtt", None)
    text = yaml.safe_dump(cfg, sort_keys=False)
    bad = tmp_path / "bad.yaml"
    bad.write_text(text + "mqtt:\n  host: 'broker:1883'\n  topic_prefix: 'lab/#'\n"
                   "  password_file: nowhere\n  tls: {cert_file: c.pem}\n  qos: 2\n")
    r = subprocess.run([db.binary("stopcockd"), "--check-config", "-c", str(bad)],
                       capture_output=True, text=True, timeout=20)
    assert r.returncode == 2
    first = len(text.splitlines()) + 1  # the line of "mqtt:"
    errs = [(int(l.split(":")[1]), l) for l in r.stderr.splitlines()
            if l.startswith(f"{bad}:")]

    def at(line, words):
        return any(n == line and words in l for n, l in errs)

    assert at(first + 1, "mqtt.host"), errs
    assert at(first + 2, "wildcard"), errs
    assert at(first + 3, "needs mqtt.username"), errs
    assert at(first + 4, "cert_file and key_file"), errs
    assert at(first + 5, "unknown key 'qos'"), errs
    # a well-formed section whose password file cannot be read: at its line
    unreadable = tmp_path / "unreadable.yaml"
    unreadable.write_text(text + "mqtt:\n  host: broker.lab\n  username: b7\n"
                          "  password_file: nowhere\n")
    r = subprocess.run([db.binary("stopcockd"), "--check-config", "-c", str(unreadable)],
                       capture_output=True, text=True, timeout=20)
    assert r.returncode == 2
    assert f"{unreadable}:{first + 3}:" in r.stderr and "cannot read" in r.stderr, r.stderr
    # without the section, the same config is fine
    good = tmp_path / "good.yaml"
    good.write_text(text)
    r = subprocess.run([db.binary("stopcockd"), "--check-config", "-c", str(good)],
                       capture_output=True, text=True, timeout=20)
    assert r.returncode == 0, r.stderr
