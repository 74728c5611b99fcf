"""Debian's mosquitto on a free loopback port, a paho-mqtt subscriber, and the
simulated bench with the fast pump whose daemon publishes to a broker: shared
by tests/e2e/test_mqtt.py and the MQTT benchmark (tests/speed/speed_mqtt.py).
Not collected by pytest (no test_ prefix)."""
import json
import os
import re
import signal
import socket
import subprocess
import threading
import time

import paho.mqtt.client as paho
import yaml

import daemon_bench as db

FAST_PUMP = db.ROOT / "tests" / "data" / "reliability" / "sim-fast.yaml"
FAST_METHOD = db.ROOT / "tests" / "data" / "reliability" / "fast-acid-mv.yaml"


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

    def pause(self, stopped):
        """SIGSTOP (a stalled broker: connections open, nothing read) or SIGCONT."""
        self.proc.send_signal(signal.SIGSTOP if stopped else signal.SIGCONT)

    def running(self):
        """Make sure it runs (after a test that stopped or killed it failed)."""
        if self.proc.poll() is None:
            self.pause(False)
        else:
            self.start()

    def close(self):
        if self.proc.poll() is None:
            self.pause(False)
            self.proc.terminate()
            try:
                self.proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self.log.close()


def _root():
    return os.geteuid() == 0


class Sub:
    """A subscriber with a persistent session (clean_session off), QoS 1,
    reconnecting by itself: what a LIMS would run."""

    def __init__(self, broker, topic, tls_ca=None, auth=None, persistent=True, keepalive_s=5):
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
        self.c.connect("127.0.0.1", broker.port, keepalive=keepalive_s)
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
        if self.mqtt is None:  # no mqtt: section at all
            cfg.pop("mqtt", None)
        else:
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
