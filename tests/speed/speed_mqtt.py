#!/usr/bin/python3
"""MQTT figures for `make bench` (docs/mqtt.md).

N daemons, each on its own simulated bench (stopcock-sim, fast pump), publish
to one mosquitto; a subscriber counts every message. Three phases, each with
the same K fast runs on every bench at once:

  1. without an mqtt: section (the baseline);
  2. publishing to the broker;
  3. publishing to a stalled broker (SIGSTOP for the whole phase, SIGCONT at
     its end).

Printed per phase: each daemon's CPU time (user + system, s) over the phase
and its peak resident memory (VmHWM, KiB), the addition timing jitter (how
late station threads woke for the engine's reading times: mean and max, from
/metrics), and, with MQTT, messages per second through the broker, the
publish latency of results (received at the subscriber minus the record's
ended_at: p50 and p99), results received against results made (after
dropping repeats of (prefix, seq)), and for the stalled broker the drain rate
of the outboxes once it goes on, with a burst of STOPCOCK_MQTT_BURST (200)
audit events per bench (halts of idle stations) waiting behind the results.

Usage: speed_mqtt.py BUILD_DIR. STOPCOCK_MQTT_BENCHES=N (default 3) and
STOPCOCK_MQTT_RUNS=K (default 2) size it; the issue's 20 benches is
STOPCOCK_MQTT_BENCHES=20 on a machine with the cores for 40 processes."""
import datetime
import os
import pathlib
import re
import statistics
import sys
import tempfile
import threading
import time

HERE = pathlib.Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent / "e2e"))

N = int(os.environ.get("STOPCOCK_MQTT_BENCHES", "3"))
K = int(os.environ.get("STOPCOCK_MQTT_RUNS", "2"))
BURST = int(os.environ.get("STOPCOCK_MQTT_BURST", "200"))  # events per bench, stalled phase
FINAL = ("finished", "failed", "aborted", "interrupted")


def proc_cpu_s(pid):
    fields = pathlib.Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def proc_hwm_kib(pid):
    m = re.search(r"^VmHWM:\s+(\d+)", pathlib.Path(f"/proc/{pid}/status").read_text(), re.M)
    return int(m.group(1))


def wake(bench):
    text = bench.request("GET", "/metrics").body.decode()

    def val(name):
        m = re.search(rf"^{name}\{{station=\"sim1\"\}} (\S+)$", text, re.M)
        return float(m.group(1))
    return (val("stopcock_wake_lateness_seconds_count"),
            val("stopcock_wake_lateness_seconds_sum"),
            val("stopcock_wake_lateness_max_seconds"))


def wall_s(rfc3339):
    return datetime.datetime.fromisoformat(rfc3339.replace("Z", "+00:00")).timestamp()


def runs_on(bench, k, tag, out):
    for i in range(k):
        bench.fresh_beaker()
        rid = bench.fast_run(f"{tag}-{i}")
        out.append(bench.wait_state(rid, FINAL, timeout_s=120))


def phase(benches, label, sub=None, broker=None, stall=False):
    seen = [len(sub.of(f"bench/{i}/status")) if sub else 0 for i in range(N)]
    for b in benches:
        b.stop_daemon()
        b.start_daemon()
    if sub:
        # each new daemon said online (after its predecessor's offline)
        sub.wait(lambda: all(len(st := sub.of(f"bench/{i}/status")) > seen[i] and
                             st[-1][0] == "online" for i in range(N)),
                 timeout_s=60, what="every bench online")
    if stall:
        broker.pause(True)
    cpu0 = [proc_cpu_s(b.daemon.pid) for b in benches]
    w0 = [wake(b) for b in benches]
    n_msgs0 = len(sub.msgs) if sub else 0
    t0 = time.monotonic()
    records = [[] for _ in benches]
    threads = [threading.Thread(target=runs_on, args=(b, K, label[:4], records[i]))
               for i, b in enumerate(benches)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    elapsed = time.monotonic() - t0
    cpu = [proc_cpu_s(b.daemon.pid) - c for b, c in zip(benches, cpu0)]
    hwm = [proc_hwm_kib(b.daemon.pid) for b in benches]
    w1 = [wake(b) for b in benches]
    late_n = sum(b[0] - a[0] for a, b in zip(w0, w1))
    late_sum = sum(b[1] - a[1] for a, b in zip(w0, w1))
    late_max = max(b[2] for b in w1)
    print(f"mqtt bench, {label}: {N} daemons x {K} runs in {elapsed:.1f} s")
    print(f"  CPU per daemon: mean {statistics.mean(cpu):.2f} s, max {max(cpu):.2f} s; "
          f"peak RSS mean {statistics.mean(hwm) / 1024:.1f} MiB, max {max(hwm) / 1024:.1f} MiB")
    print(f"  addition timing jitter: mean {1000 * late_sum / max(late_n, 1):.2f} ms over "
          f"{late_n:.0f} wake-ups, max {1000 * late_max:.2f} ms (since each daemon started)")
    if not sub:
        return
    if stall:
        # a burst for the drain rate: audit events (halts of the idle
        # stations) pile up in the outboxes behind the results
        burst = [threading.Thread(target=lambda b=b: [b.write("POST", "/v1/stations/sim1/halt")
                                                      for _ in range(BURST)])
                 for b in benches]
        for t in burst:
            t.start()
        for t in burst:
            t.join()
        backlog = sum(b.metric("stopcock_mqtt_outbox_messages") for b in benches)
        drain0 = time.monotonic()
        broker.pause(False)
        deadline = drain0 + 120
        while any(b.metric("stopcock_mqtt_outbox_messages") for b in benches):
            assert time.monotonic() < deadline, "the outboxes did not drain"
            time.sleep(0.02)
        drain = time.monotonic() - drain0
        print(f"  outboxes drained {backlog:.0f} messages in {drain:.2f} s after the broker "
              f"went on: {backlog / drain:.0f} messages/s")
    want = {(f"bench/{i}", r["seq"]) for i, rs in enumerate(records) for r in rs}
    ends = {(f"bench/{i}", r["seq"]): wall_s(r["ended_at"])
            for i, rs in enumerate(records) for r in rs}

    def got():
        return {k for k in sub.arrivals if k in want}
    sub.wait(lambda: got() == want, timeout_s=120, what="every result")
    msgs = len(sub.msgs) - n_msgs0
    lat = sorted(sub.arrivals[k] - ends[k] for k in want)
    p99 = lat[min(len(lat) - 1, int(0.99 * len(lat)))]
    print(f"  broker traffic: {msgs / elapsed:.1f} messages/s from {N} daemons; results "
          f"{len(got())} of {len(want)} (after de-duplication)")
    print(f"  result publish latency (ended_at to subscriber{', the stall included' if stall else ''}): p50 "
          f"{1000 * statistics.median(lat):.0f} ms, p99 {1000 * p99:.0f} ms")


def main():
    if len(sys.argv) != 2:
        sys.exit("usage: speed_mqtt.py BUILD_DIR")
    os.environ["STOPCOCK_BUILD"] = os.path.abspath(sys.argv[1])
    from mqtt_bench import Broker, MqttBench, Sub
    import json

    class Counter(Sub):
        """Every message; the first arrival (wall clock) of each result."""

        def __init__(self, *a, **kw):
            self.arrivals = {}
            super().__init__(*a, **kw)

        def _on_message(self, c, u, m):
            now = time.time()
            super()._on_message(c, u, m)
            if m.topic.endswith("/results"):
                r = json.loads(m.payload)
                self.arrivals.setdefault((m.topic.rsplit("/", 1)[0], r["seq"]), now)

    with tempfile.TemporaryDirectory(prefix="stopcock-mqtt-bench-") as tmp:
        tmp = pathlib.Path(tmp)
        broker = Broker(tmp)
        benches, sub = [], None
        try:
            for i in range(N):
                d = tmp / f"bench{i}"
                d.mkdir()
                benches.append(MqttBench(d, None))
            phase(benches, "without MQTT")
            for i, b in enumerate(benches):
                b.set_mqtt({"host": "127.0.0.1", "port": broker.port,
                            "topic_prefix": f"bench/{i}"})
            # a persistent session that outlasts the stall, as a LIMS's would
            sub = Counter(broker, "bench/#", keepalive_s=120)
            phase(benches, "with MQTT", sub, broker)
            phase(benches, "with MQTT, broker stalled (SIGSTOP)", sub, broker, stall=True)
        finally:
            if sub:
                sub.close()
            for b in benches:
                b.close()
            broker.close()


if __name__ == "__main__":
    main()
