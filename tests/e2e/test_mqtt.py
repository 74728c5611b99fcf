"""Publishing to MQTT (docs/mqtt.md) against a real broker: each test starts
Debian's mosquitto on a free loopback port with a config it writes, and
subscribes with paho-mqtt. One simulated bench and daemon serve the module;
the tests change the daemon's mqtt: section and restart it where they must.

What is checked: a run's record on <prefix>/results equals GET /v1/runs/{id}
and the retained station state follows the run; `offline` appears when the
daemon is killed; with the broker killed mid-run and restarted, or the daemon
killed while results wait in its outbox, every result arrives, in seq order,
none twice once repeats of (prefix, seq) are dropped; TLS with a certificate
the test makes; and --check-config errors at their lines."""
import json
import re
import signal
import socket
import subprocess
import threading
import time

import paho.mqtt.client as paho
import pytest
import yaml

import daemon_bench as db

FAST_PUMP = db.ROOT / "tests" / "data" / "reliability" / "sim-fast.yaml"
FAST_METHOD = db.ROOT / "tests" / "data" / "reliability" / "fast-acid-mv.yaml"
BROKER_DOWN_S = 3.0  # the outage in the test; the closing report measures 30 s


class Broker:
    """mosquitto on a free loopback port, persistent (so a subscriber's
    session outlives a broker kill, as a LIMS's would), optionally TLS and
    passwords."""

    def __init__(self, tmp, name="broker", tls=None, passwd=None):
        self.dir = tmp / name
        self.dir.mkdir()
        self.port = db.free_port()
        self.proc = None
        lines = [f"listener {self.port} 127.0.0.1",
                 "persistence true", f"persistence_location {self.dir}/",
                 # saved at each subscription change, so a kill keeps sessions
                 "autosave_on_changes true", "autosave_interval 1",
                 "user root" if _root() else "",
                 f"allow_anonymous {'false' if passwd else 'true'}"]
        if passwd:
            pw = self.dir / "passwd"
            r = subprocess.run(["mosquitto_passwd", "-c", "-b", str(pw), *passwd],
                               capture_output=True, text=True, timeout=20)
            assert r.returncode == 0, r.stderr
            lines.append(f"password_file {pw}")
        if tls:
            lines += [f"cafile {tls['ca']}", f"certfile {tls['cert']}",
                      f"keyfile {tls['key']}"]
        self.conf = self.dir / "mosquitto.conf"
        self.conf.write_text("\n".join(lines) + "\n")
        self.log = open(self.dir / "log", "a")
        self.start()

    def start(self):
        self.proc = subprocess.Popen(["mosquitto", "-c", str(self.conf)],
                                     stdout=self.log, stderr=self.log)
        deadline = time.monotonic() + 10
        while True:
            try:
                socket.create_connection(("127.0.0.1", self.port), timeout=1).close()
                return
            except OSError:
                assert self.proc.poll() is None, (self.dir / "log").read_text()
                assert time.monotonic() < deadline, "mosquitto did not listen"
                time.sleep(0.05)

    def kill(self):
        self.proc.send_signal(signal.SIGKILL)
        self.proc.wait(timeout=10)

    def close(self):
        if self.proc.poll() is None:
            self.proc.terminate()
            self.proc.wait(timeout=10)
        self.log.close()


def _root():
    import os
    return os.geteuid() == 0


class Sub:
    """A subscriber with a persistent session (clean_session off), QoS 1,
    reconnecting by itself: what a LIMS would run."""

    def __init__(self, broker, topic, tls_ca=None, auth=None, persistent=True):
        self.msgs = []
        self.lock = threading.Lock()
        self.ready = threading.Event()
        cid = f"test-{broker.port}-{time.monotonic_ns()}"
        self.c = paho.Client(client_id=cid, clean_session=not persistent)
        if tls_ca:
            self.c.tls_set(ca_certs=str(tls_ca))
        if auth:
            self.c.username_pw_set(*auth)
        self.c.reconnect_delay_set(0.1, 0.5)
        self.c.on_connect = lambda c, u, f, rc: (c.subscribe(topic, qos=1), None)[1]
        self.c.on_subscribe = lambda c, u, mid, q: self.ready.set()
        self.c.on_message = self._on_message
        self.c.connect("127.0.0.1", broker.port, keepalive=5)
        self.c.loop_start()
        assert self.ready.wait(10), "the subscription was not acknowledged"
        if persistent:
            time.sleep(0.3)  # for the broker to save the session (autosave_on_changes)

    def _on_message(self, c, u, m):
        with self.lock:
            self.msgs.append((m.topic, m.payload.decode(), bool(m.retain)))

    def of(self, topic):
        with self.lock:
            return [(p, r) for t, p, r in self.msgs if t == topic]

    def wait(self, pred, timeout_s=30, what="a message"):
        deadline = time.monotonic() + timeout_s
        while not pred():
            assert time.monotonic() < deadline, f"no {what} within {timeout_s} s"
            time.sleep(0.05)

    def close(self):
        self.c.loop_stop()
        self.c.disconnect()


class MqttBench(db.Bench):
    """The simulated bench with the fast pump; its daemon publishes to the
    broker its mqtt: section names (set_mqtt)."""

    def __init__(self, tmp, mqtt):
        self.mqtt = mqtt
        super().__init__(tmp)
        self.put_method(FAST_METHOD)

    def set_mqtt(self, mqtt):
        self.mqtt = mqtt

    def start_daemon(self, **kw):
        cfg = yaml.safe_load(self.config.read_text())
        cfg["stations"][0]["burette"]["profile"] = str(FAST_PUMP)
        cfg["mqtt"] = self.mqtt
        self.config.write_text(yaml.safe_dump(cfg, sort_keys=False))
        return super().start_daemon(**kw)

    def kill_daemon(self):
        self.daemon.send_signal(signal.SIGKILL)
        self.daemon.wait(timeout=10)

    def metric(self, name):
        text = self.request("GET", "/metrics").body.decode()
        m = re.search(rf"^{name} (\S+)$", text, re.M)
        return float(m.group(1)) if m else None

    def fast_run(self, sample):
        return self.start_run(method="fast-acid-mv", sample=sample, amount=10.0)


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


def results_by_seq(sub, prefix="lab/b7"):
    """(seq, record) in arrival order, and the records after dropping
    repeats of a seq."""
    got = [json.loads(p) for p, _ in sub.of(f"{prefix}/results")]
    seen, unique = set(), []
    for r in got:
        if r["seq"] not in seen:
            seen.add(r["seq"])
            unique.append(r)
    return got, unique


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


def test_broker_killed_mid_run_loses_nothing(bench, broker):
    sub = Sub(broker, "lab/b7/results")
    try:
        before = bench.get("/v1/results?after=0&limit=1000")["next_after"]
        bench.fresh_beaker()
        rids = [bench.fast_run("OUTAGE-1"), bench.fast_run("OUTAGE-2")]
        bench.wait_points(rids[0], 2)
        broker.kill()
        down_at = time.monotonic()
        bench.wait_state(rids[0], ("finished", "failed", "aborted"), timeout_s=60)
        # the finished run waits in the outbox, and /metrics says so
        deadline = time.monotonic() + 10
        while (bench.metric("stopcock_mqtt_outbox_messages") or 0) < 1:
            assert time.monotonic() < deadline, "no backlog in /metrics"
            time.sleep(0.1)
        assert bench.metric("stopcock_mqtt_connected") == 0
        time.sleep(max(0.0, BROKER_DOWN_S - (time.monotonic() - down_at)))
        broker.start()
        for rid in rids:
            bench.wait_state(rid, ("finished", "failed", "aborted"), timeout_s=60)
        feed = bench.get(f"/v1/results?after={before}&limit=1000")["results"]
        want = [r["seq"] for r in feed]
        assert [r["id"] for r in feed][-2:] == rids
        sub.wait(lambda: [r["seq"] for r in results_by_seq(sub)[1]] == want, timeout_s=60,
                 what=f"results {want}")
        got, unique = results_by_seq(sub)
        # every result, once after de-duplication, in seq order, as the feed has it
        assert unique == feed
        assert [r["seq"] for r in got] == sorted(r["seq"] for r in got)
    finally:
        sub.close()


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
