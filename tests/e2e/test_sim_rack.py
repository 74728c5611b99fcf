"""stopcock-sim --rack as docs/stopcock-sim.1 describes it: a sample changer on
its own pty over a rack of beakers, written into --config-out, checked by
`stopcockd --check-config` and driven through `stopcock ports --test` (the
changer-serial driver against the simulated changer, a doser's burette driver
against its own simulated pump); the rack file's errors
with file:line:col; and each changer fault ending in a clear error."""
import json
import os
import select
import shutil
import socket
import subprocess

import pytest

import benchlib  # noqa: E402
from common import free_port  # noqa: E402

SCEN = os.path.join(benchlib.ROOT, "config", "scenarios")


def write_rack(d, text):
    for name in ("cider-acidity.yaml", "water-alkalinity.yaml", "whey-ammonium.yaml"):
        shutil.copy(os.path.join(SCEN, name), d / name)
    rack = d / "rack.yaml"
    rack.write_text(text)
    return rack


GOOD = ("positions:\n  1: cider-acidity.yaml\n  2: water-alkalinity.yaml\n"
        "rinse: 15\npark: 16\n")


class RackSim:
    def __init__(self, d, rack_text=GOOD):
        self.dir = d
        self.config = d / "stopcockd.yaml"
        self.ctl_path = str(d / "ctl")
        rack = write_rack(d, rack_text)
        self.proc = subprocess.Popen(
            [benchlib.build_bin("stopcock-sim"), "--rack", str(rack),
             "--modbus-tcp", f"127.0.0.1:{free_port()}", "--pump-link", str(d / "pump"),
             "--changer-link", str(d / "changer"), "--control", self.ctl_path,
             "--config-out", str(self.config), "--state-dir", str(d / "state")],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        ready, _, _ = select.select([self.proc.stdout], [], [], 10)
        line = self.proc.stdout.readline() if ready else ""
        if line.strip() != "ready":
            self.proc.kill()
            raise AssertionError(f"no ready: {line!r} {self.proc.stderr.read()}")

    def control(self, line):
        with socket.socket(socket.AF_UNIX) as s:
            s.settimeout(5)
            s.connect(self.ctl_path)
            f = s.makefile("rw")
            f.write(line + "\n")
            f.flush()
            return f.readline().rstrip("\n")

    def state(self):
        return json.loads(self.control("state"))

    def ports(self, *lines):
        r = subprocess.run([benchlib.build_bin("stopcock"), "ports", "--test",
                            str(self.config)], input="\n".join(lines) + "\nquit\n",
                           capture_output=True, text=True, timeout=60)
        assert r.returncode == 0, r.stderr
        out = [json.loads(x) for x in r.stdout.splitlines()]
        return {o["cmd"]: o for o in out if o["cmd"].startswith("open")}, \
            [o for o in out if not o["cmd"].startswith("open")]

    def stop(self):
        self.proc.terminate()
        rc = self.proc.wait(10)
        self.proc.stdout.close()
        self.proc.stderr.close()
        return rc


@pytest.fixture
def rsim(tmp_path):
    s = RackSim(tmp_path)
    yield s
    assert s.stop() == 0


def test_ports_drive_a_doser(tmp_path):
    # whey-ammonium's beaker names the doser `acid`: the simulator gives it
    # a pty of its own and writes it under the station's dosers:
    sim = RackSim(tmp_path, "positions:\n  1: whey-ammonium.yaml\nrinse: 15\npark: 16\n")
    try:
        opened, out = sim.ports("doser-dose acid 0.5", "doser-wait acid 20",
                                "doser-status acid", "doser-halt acid", "doser-dose acid",
                                "doser-status base", "doser-stir acid", "status")
        assert opened["open doser acid"]["status"] == "ok", opened
        assert opened["open doser acid"]["capacity_ml"] > 0
        assert [(o["cmd"], o["status"], o.get("doser")) for o in out] == [
            ("doser-dose", "ok", "acid"), ("doser-wait", "ok", "acid"),
            ("doser-status", "ok", "acid"), ("doser-halt", "ok", "acid"),
            ("doser-dose", "config", "acid"), ("doser-status", "config", "base"),
            ("doser-stir", "config", "acid"), ("status", "ok", None)]
        assert out[1]["moving"] is False
        assert out[1]["dispensed_ml"] == pytest.approx(0.5, abs=1e-3)
        assert "needs a volume" in out[4]["error"]
        assert "no doser named 'base'" in out[5]["error"]
        # the doser's own line moved, not the burette's
        assert out[7]["dispensed_ml"] == 0.0
        assert sim.state()["dosers"]["acid"]["dispensed_ml"] == pytest.approx(0.5, abs=1e-3)
    finally:
        assert sim.stop() == 0


def test_rack_bench_config_and_state(rsim):
    cfg = rsim.config.read_text()
    assert "changer:" in cfg and "driver: changer-serial" in cfg
    assert os.readlink(rsim.dir / "changer").startswith("/dev/pts/")
    st = rsim.state()
    assert st["position"] == 16 and st["lift"] == "up"   # parked, head up
    assert st["ph"] is None                               # no beaker: air
    assert st["carried_ml"] == 0.0
    r = subprocess.run([benchlib.build_bin("stopcockd"), "--check-config", "-c",
                        str(rsim.config)], capture_output=True, text=True, timeout=20)
    assert r.returncode == 0, r.stderr


def test_ports_drive_the_changer(rsim):
    opened, out = rsim.ports("changer-move 2", "changer-wait 5", "changer-lift down",
                             "changer-wait 5", "changer-rinse 0.2", "changer-wait 5",
                             "changer-move 1")
    assert opened["open changer"]["status"] == "ok"
    assert opened["open changer"]["positions"] == 16
    assert [o["status"] for o in out] == ["ok"] * 6 + ["config"]
    assert out[1]["position"] == 2 and out[1]["lift"] == "up"
    assert out[3]["position"] == 2 and out[3]["lift"] == "down"
    assert "head is down" in out[6]["error"]
    st = rsim.state()
    assert st["position"] == 2 and st["lift"] == "down"
    # the probe is in the water sample now: its pH, not air's null
    assert st["ph"] is not None and 6.5 < st["ph"] < 9.5
    assert st["carried_ml"] == 0.0   # a clean head came down: nothing carried


@pytest.mark.parametrize("kind,cmds,status,words", [
    ("jam", ("changer-move 3", "changer-wait 5"), "device_error", "move jammed"),
    ("stuck-lift", ("changer-lift down", "changer-wait 5"), "device_error", "lift stuck"),
    # a fresh `ports --test` opens the line with the halt: that goes unanswered
    ("mute-changer", ("changer-status",), "timeout", "no reply to 'HALT' within 500 ms"),
])
def test_changer_faults_give_clear_errors(rsim, kind, cmds, status, words):
    opened, _ = rsim.ports("changer-status")
    assert rsim.control(f"fault {kind}") == "ok"
    assert rsim.state()["fault"] == kind
    _, out = rsim.ports(*cmds)
    last = out[-1]
    assert last["status"] == status and words in last["error"], out
    assert last.get("fault", False) is (status == "device_error")
    assert rsim.control("clear") == "ok"
    _, out = rsim.ports("changer-halt", "changer-status")
    assert [o["status"] for o in out] == ["ok", "ok"]


@pytest.mark.parametrize("text,where,words", [
    ("positions:\n  1: cider-acidity.yaml\nrinse: 1\n", "3:8",
     "rinse: position 1 holds a sample"),
    ("positions:\n  1: cider-acidity.yaml\n  20: water-alkalinity.yaml\n", "3:3",
     "a position must be a position number 1..16 (got 20)"),
    ("positions:\n  1: missing.yaml\n", "2:6", "scenario 'missing.yaml' cannot be used"),
])
def test_rack_file_errors(tmp_path, text, where, words):
    rack = write_rack(tmp_path, text)
    r = subprocess.run([benchlib.build_bin("stopcock-sim"), "--rack", str(rack),
                        "--modbus-tcp", f"127.0.0.1:{free_port()}",
                        "--pump-link", str(tmp_path / "pump")],
                       capture_output=True, text=True, timeout=20)
    assert r.returncode == 2
    assert f"{rack}:{where}: " in r.stderr and words in r.stderr, r.stderr


def test_bad_changer_in_station_config(tmp_path):
    cfg = tmp_path / "stopcockd.yaml"
    cfg.write_text(
        "stations:\n  - name: t1\n    vessel_max_ml: 100\n"
        "    burette: {driver: pump-serial, port: /nonexistent, profile: sim}\n"
        "    probe: {driver: probe-modbus, transport: tcp, host: 127.0.0.1, "
        "registers: {mv: {address: 0, type: float32}}}\n"
        "    changer: {driver: changer-serial, port: /nonexistent, profile: nosuch}\n")
    r = subprocess.run([benchlib.build_bin("stopcockd"), "--check-config", "-c", str(cfg)],
                       capture_output=True, text=True, timeout=20)
    assert r.returncode == 2
    assert f"{cfg}:6:" in r.stderr and "changer profile 'nosuch' not found" in r.stderr
