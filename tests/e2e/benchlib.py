"""Helpers for the simulator and driver tests: start stopcock-sim, talk to
its control socket, drive the C drivers through `stopcock ports --test`."""
import json
import os
import queue
import re
import select
import signal
import socket
import subprocess
import threading
import time
from common import free_port  # noqa: E402

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
SCENARIO = os.path.join(ROOT, "tests", "data", "drivers", "cider.yaml")


def build_bin(name):
    build = os.environ.get("STOPCOCK_BUILD")
    assert build, "STOPCOCK_BUILD must name the build directory"
    path = os.path.join(build, "bin", name)
    assert os.access(path, os.X_OK), f"{path} is not built"
    return path


class Sim:
    """A running stopcock-sim in directory d, with a control connection."""

    def __init__(self, d, rtu=False, extra=()):
        self.dir = str(d)
        self.pump = os.path.join(self.dir, "pump")
        self.rtu = os.path.join(self.dir, "rtu") if rtu else None
        self.ctl_path = os.path.join(self.dir, "ctl")
        self.config = os.path.join(self.dir, "stopcockd.yaml")
        self.port = free_port()
        args = [build_bin("stopcock-sim"), "--scenario", SCENARIO,
                "--modbus-tcp", f"127.0.0.1:{self.port}", "--pump-link", self.pump,
                "--control", self.ctl_path, "--config-out", self.config,
                "--state-dir", os.path.join(self.dir, "state"), *extra]
        if rtu:
            args += ["--rtu-link", self.rtu]
        self.proc = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                     text=True)
        ready, _, _ = select.select([self.proc.stdout], [], [], 10)
        line = self.proc.stdout.readline() if ready else ""
        if line.strip() != "ready":
            self.proc.kill()
            raise AssertionError(f"stopcock-sim did not print ready: {line!r} "
                                 f"{self.proc.stderr.read()}")
        self.ctl = socket.socket(socket.AF_UNIX)
        self.ctl.settimeout(5)
        self.ctl.connect(self.ctl_path)
        self.ctl_file = self.ctl.makefile("rw")

    def control(self, line):
        self.ctl_file.write(line + "\n")
        self.ctl_file.flush()
        return self.ctl_file.readline().rstrip("\n")

    def state(self):
        return json.loads(self.control("state"))

    def stop(self):
        self.ctl_file.close()
        self.ctl.close()
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
        try:
            return self.proc.wait(10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
            return None
        finally:
            self.proc.stdout.close()
            self.proc.stderr.close()


def station_config(path, burette=None, probe=None, stirrer=None):
    """Write a config with one station `t1` holding the given subtrees
    (flow-style YAML strings)."""
    lines = ["stations:", "  - name: t1"]
    for key, val in (("burette", burette), ("probe", probe), ("stirrer", stirrer)):
        if val:
            lines.append(f"    {key}: {val}")
    with open(path, "w") as f:
        f.write("\n".join(lines) + "\n")
    return str(path)


def sim_pump_cfg(sim, timeout_ms=300, retries=2):
    return (f"{{driver: pump-serial, port: {sim.pump}, timeout_ms: {timeout_ms}, "
            f"retries: {retries}, profile: {ROOT}/config/pumps/sim.yaml}}")


SIM_REGS = ("{mv: {table: input, address: 0, type: float32, word_order: big}, "
            "ph: {table: input, address: 2, type: float32}, "
            "temperature_c: {table: input, address: 4, type: float32}, "
            "status: {table: input, address: 6, type: uint16}, "
            "counter: {table: input, address: 7, type: uint16}}")


def sim_probe_tcp_cfg(sim, timeout_ms=200, retries=1, frozen_after_s=1.0):
    return (f"{{driver: probe-modbus, transport: tcp, host: 127.0.0.1, port: {sim.port}, "
            f"unit: 1, response_timeout_ms: {timeout_ms}, retries: {retries}, "
            f"frozen_after_s: {frozen_after_s}, registers: {SIM_REGS}}}")


def sim_probe_rtu_cfg(sim, timeout_ms=200, retries=1):
    return (f"{{driver: probe-modbus, transport: rtu, device: {sim.rtu}, baud: 19200, "
            f"parity: even, unit: 1, response_timeout_ms: {timeout_ms}, retries: {retries}, "
            f"registers: {SIM_REGS}}}")


class Devices:
    """`stopcock ports --test CONFIG`: one command in, one JSON line out."""

    def __init__(self, config):
        self.proc = subprocess.Popen([build_bin("stopcock"), "ports", "--test", config],
                                     stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                     stderr=subprocess.PIPE, text=True, bufsize=1)
        self.opened = []
        self.lines = queue.Queue()
        self.reader = threading.Thread(target=self._read, daemon=True)
        self.reader.start()

    def _read(self):
        for line in self.proc.stdout:
            self.lines.put(line)
        self.lines.put("")

    def read_line(self, timeout=30):
        try:
            line = self.lines.get(timeout=timeout)
        except queue.Empty:
            raise AssertionError("stopcock ports --test did not answer")
        assert line, f"stopcock ports --test ended: {self.proc.stderr.read()}"
        return json.loads(line)

    def open(self, n):
        self.opened = [self.read_line() for _ in range(n)]
        return self.opened

    def do(self, cmd):
        t0 = time.monotonic()
        self.proc.stdin.write(cmd + "\n")
        self.proc.stdin.flush()
        r = self.read_line()
        r["wall_s"] = time.monotonic() - t0
        return r

    def until_ok(self, cmd, within_s=3.0):
        """Repeat cmd until it answers ok (recovery), at most within_s."""
        t0 = time.monotonic()
        while True:
            r = self.do(cmd)
            if r["status"] == "ok" or time.monotonic() - t0 > within_s:
                return r
            time.sleep(0.05)

    def close(self):
        try:
            self.proc.stdin.write("quit\n")
            self.proc.stdin.flush()
        except BrokenPipeError:
            pass
        try:
            rc = self.proc.wait(10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            rc = None
        self.reader.join(5)
        self.proc.stdout.close()
        self.proc.stderr.close()
        self.proc.stdin.close()
        return rc


def nernst_mv(t_c):
    """ln(10) R T / F in mV (CODATA 2018 R = 8.314462618, F = 96485.33212)."""
    return 2.302585093 * 8.314462618 * (t_c + 273.15) / 96485.33212 * 1000.0


HEX_TOKEN = re.compile(r"^sim:[0-9a-f]{32}$")
