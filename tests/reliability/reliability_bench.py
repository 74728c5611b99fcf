"""The simulated bench of tests/e2e/daemon_bench.py, set up for the reliability
suites (tests/reliability/test_faults.py, test_crash.py, test_diskfull.py, test_load.py,
test_security.py, test_valgrind.py; docs/reliability.md).

What it changes, all through files the daemon reads:
- the burette uses tests/data/reliability/sim-fast.yaml (the simulator's pump
  profile at its top speed, 8000 steps/s) and the runs use
  tests/data/reliability/fast-acid-mv.yaml, so a whole run takes seconds;
- the transmitter is reached through ModbusProxy, a TCP relay in this
  process that can turn the transmitter's replies into garbage on command
  (the "garbage on the Modbus line" fault, which stopcock-sim has no kind
  for);
- frozen_after_s is 2 s, so a frozen transmitter is found quickly.
Not collected by pytest (no test_ prefix).
"""
import os
import pathlib
import random
import select
import socket
import threading
import time
import tty

import yaml

import daemon_bench as db

HERE = pathlib.Path(__file__).resolve().parents[1]  # tests/
FAST_PUMP = HERE / "data" / "reliability" / "sim-fast.yaml"
FAST_METHOD = HERE / "data" / "reliability" / "fast-acid-mv.yaml"
FAST_ID = "fast-acid-mv"
FROZEN_AFTER_S = 2.0
MEASURED = ("t_s", "volume_ml", "mv", "ph", "temperature_c", "settled")


def endpoint_right_or_marked(rec, rel=0.03):
    """The run's first endpoint is within rel of the stoichiometric 2.000 mL
    (tests/data/daemon/wash-acid.yaml), or every result says it is doubtful:
    never a wrong endpoint passed as right. A fault ridden out on a busy
    machine can leave the jump's points unsettled; the engine then marks them
    (docs/engine.md, "Uncertainty") rather than the test failing by chance.
    Returns the endpoint volume, mL."""
    v = rec["endpoints"][0]["volume_ml"]
    if abs(v - db.EXPECTED_ML) > rel * db.EXPECTED_ML:
        assert rec["results"] and all(r["accept"] == "doubtful" for r in rec["results"]), (
            f"endpoint {v} mL is more than {rel:.0%} off {db.EXPECTED_ML} mL and not marked",
            rec["endpoints"], rec["results"])
    return v


def report(request, lines):
    """Print figure lines for docs/reliability.md and the closing note past
    pytest's output capture (so `make check` shows them), and append them to
    $STOPCOCK_FIGURES when that names a file."""
    if not lines:
        return
    text = "".join(f"[figure] {x}\n" for x in lines)
    cm = request.config.pluginmanager.getplugin("capturemanager")
    if cm:
        with cm.global_and_fixture_disabled():
            print("\n" + text, end="", flush=True)
    else:
        print(text, end="")
    path = os.environ.get("STOPCOCK_FIGURES")
    if path:
        with open(path, "a") as f:
            f.write(text)


class ModbusProxy:
    """A TCP relay: client <-> proxy <-> (host, port). With `garbage` set,
    every reply from the server is replaced by as many random bytes."""

    def __init__(self, host, port):
        self.target = (host, port)
        self.garbage = False
        self.replies_garbled = 0
        self.lsock = socket.socket()
        self.lsock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self.lsock.bind(("127.0.0.1", 0))
        self.lsock.listen(8)
        self.port = self.lsock.getsockname()[1]
        self.stop = False
        self.rng = random.Random(9)
        self.thread = threading.Thread(target=self._serve, daemon=True)
        self.thread.start()

    def _serve(self):
        pairs = {}
        while not self.stop:
            socks = [self.lsock] + list(pairs)
            try:
                r, _, _ = select.select(socks, [], [], 0.1)
            except (OSError, ValueError):
                # a socket closed under us: drop the dead ones
                for s in list(pairs):
                    if s.fileno() < 0:
                        pairs.pop(s, None)
                continue
            for s in r:
                if s is self.lsock:
                    try:
                        c, _ = self.lsock.accept()
                        u = socket.create_connection(self.target, timeout=2)
                    except OSError:
                        continue
                    pairs[c] = (u, False)
                    pairs[u] = (c, True)
                    continue
                if s not in pairs:
                    continue
                other, from_server = pairs[s]
                try:
                    data = s.recv(4096)
                except OSError:
                    data = b""
                if not data:
                    for x in (s, other):
                        pairs.pop(x, None)
                        x.close()
                    continue
                if from_server and self.garbage:
                    data = bytes(self.rng.randrange(256) for _ in data)
                    self.replies_garbled += 1
                try:
                    other.sendall(data)
                except OSError:
                    pass
        for s in pairs:
            s.close()

    def close(self):
        self.stop = True
        self.thread.join(timeout=5)
        self.lsock.close()


class PumpRelay:
    """A pseudo-terminal between the daemon and the simulated pump that logs
    every command line the daemon sends: the crash suite checks that the
    first command after a restart is a halt. `commands` is a list of
    (time.monotonic(), line)."""

    def __init__(self, sim_link, link_path):
        self.commands = []
        self.lock = threading.Lock()
        self.master, self.slave = os.openpty()   # keep the slave open: no EIO on master
        tty.setraw(self.slave)
        self.link = pathlib.Path(link_path)
        if self.link.exists() or self.link.is_symlink():
            self.link.unlink()
        self.link.symlink_to(os.ttyname(self.slave))
        self.sim_fd = os.open(str(sim_link), os.O_RDWR | os.O_NOCTTY)
        tty.setraw(self.sim_fd)
        self.stop = False
        self.buf = b""
        self.thread = threading.Thread(target=self._serve, daemon=True)
        self.thread.start()

    def _serve(self):
        while not self.stop:
            try:
                r, _, _ = select.select([self.master, self.sim_fd], [], [], 0.1)
            except (OSError, ValueError):
                return
            for fd in r:
                try:
                    data = os.read(fd, 4096)
                except OSError:
                    continue
                if fd == self.master:
                    self.buf += data
                    while b"\n" in self.buf:
                        line, self.buf = self.buf.split(b"\n", 1)
                        with self.lock:
                            self.commands.append((time.monotonic(),
                                                  line.decode(errors="replace").strip()))
                    os.write(self.sim_fd, data)
                else:
                    os.write(self.master, data)

    def since(self, t):
        with self.lock:
            return [c for (tc, c) in self.commands if tc >= t]

    def close(self):
        self.stop = True
        self.thread.join(timeout=5)
        for fd in (self.master, self.slave, self.sim_fd):
            os.close(fd)


class Bench(db.Bench):
    """stopcock-sim + stopcockd with a fast pump, a fast method and the
    Modbus proxy. `daemon_cmd(argv)` may wrap the daemon (valgrind)."""

    def __init__(self, tmp, extra_config="", daemon_wrap=None, state_dir=None,
                 pump_relay=False, http=None, burette=None):
        self.http_overrides = dict(http or {})
        # keys of the station's burette: (a profile other than the fast one, rates)
        self.burette_overrides = dict(burette or {})
        self.proxy = None
        self.relay = None
        self.want_relay = pump_relay
        self.daemon_wrap = daemon_wrap or []
        self.state_dir_override = state_dir
        self._rewired = False
        super().__init__(tmp, extra_config=extra_config)
        self.put_method(FAST_METHOD)

    def _rewire(self):
        cfg = yaml.safe_load(self.config.read_text())
        st = cfg["stations"][0]
        st["burette"]["profile"] = str(FAST_PUMP)
        st["burette"].update(self.burette_overrides)
        if self.want_relay:
            self.relay = PumpRelay(st["burette"]["port"], self.tmp / "pump-relay")
            st["burette"]["port"] = str(self.relay.link)
        probe = st["probe"]
        self.proxy = ModbusProxy(probe["host"], probe["port"])
        probe["port"] = self.proxy.port
        probe["frozen_after_s"] = FROZEN_AFTER_S
        if "stirrer" in st:
            st["stirrer"]["port"] = self.proxy.port
        cfg["http"].update(self.http_overrides)
        if self.state_dir_override:
            cfg["storage"]["database"] = str(pathlib.Path(self.state_dir_override) /
                                             "stopcock.db")
        self.config.write_text(yaml.safe_dump(cfg, sort_keys=False))
        self._rewired = True

    def start_daemon(self):
        if not self._rewired:
            self._rewire()
        if not self.daemon_wrap:
            return super().start_daemon()
        # Under a wrapper (valgrind) the daemon is slower to answer.
        return super().start_daemon(wrap=self.daemon_wrap, wait_s=120, poll_s=0.2)

    def close(self):
        try:
            super().close()
        finally:
            if self.proxy:
                self.proxy.close()
            if self.relay:
                self.relay.close()

    # ---- helpers for the suites ----
    def start_fast(self, sample="RELY-1", amount=10.0):
        return self.start_run(method=FAST_ID, sample=sample, amount=amount)

    def measured(self, rid):
        """The measured fields of each point. dpdv is left out: it is
        derived from the neighbours, so it changes as later points come."""
        return [{k: p[k] for k in MEASURED} for p in self.points(rid)]

    def points(self, rid):
        return self.get(f"/v1/runs/{rid}/points")["points"]

    def burette_still(self, for_s=0.6):
        """The simulated plunger is not moving and its count does not change
        over for_s seconds (the simulator's own view, not the daemon's)."""
        a = self.sim_state()
        time.sleep(for_s)
        b = self.sim_state()
        return (not a["moving"] and not b["moving"] and
                a["dispensed_ml"] == b["dispensed_ml"]), a, b

    def wait_idle(self, timeout_s=30):
        """Until the station has no run and is not offline."""
        deadline = time.monotonic() + timeout_s
        while True:
            s = self.station()
            if s["run"] is None and s["state"] not in ("offline",):
                return s
            assert time.monotonic() < deadline, f"station still {s['state']}, run {s['run']}"
            time.sleep(0.1)
