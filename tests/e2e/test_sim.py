"""stopcock-sim as docs/drivers.md describes it: the ready line, the pump's own
protocol and limits on its pty, the transmitter's registers over Modbus
(pymodbus as an independent client), the control socket, --config-out, and a
clean exit on SIGTERM."""
import os
import stat
import struct
import subprocess
import sys
import time

import pytest
import serial  # Debian python3-serial
import yaml

import benchlib  # noqa: E402
from benchlib import Sim  # noqa: E402


@pytest.fixture
def sim(tmp_path):
    s = Sim(tmp_path, rtu=True)
    yield s
    assert s.stop() == 0


def pump_line(port, cmd):
    port.reset_input_buffer()
    port.write((cmd + "\n").encode())
    reply = port.read_until(b"\r\n")
    assert reply.endswith(b"\r\n"), f"no reply to {cmd!r}: {reply!r}"
    return reply[:-2].decode()


def test_links_and_state_fields(sim):
    assert os.path.islink(sim.pump) and os.readlink(sim.pump).startswith("/dev/pts/")
    assert os.path.islink(sim.rtu)
    st = sim.state()
    for key, kind in (("dispensed_ml", float), ("ph", float), ("mv", float),
                      ("temperature_c", float), ("moving", bool)):
        assert isinstance(st[key], kind), key
    assert st["fault"] is None
    assert st["dispensed_ml"] == 0.0 and st["moving"] is False
    assert st["temperature_c"] == pytest.approx(25.0)
    # 0.042 mol/L malic acid diluted 10 -> 50 mL: pH near 2.8 (pKa1 3.40)
    assert 2.5 < st["ph"] < 3.2
    # electrode at 100 % slope, offset 0: mV = -k (pH - 7), k = 59.16 mV at 25 degC
    assert st["mv"] == pytest.approx(-benchlib.nernst_mv(25.0) * (st["ph"] - 7), abs=1.0)


def test_control_socket_commands(sim, tmp_path):
    assert sim.control("fault bogus").startswith("error: unknown fault 'bogus'")
    assert sim.control("frobnicate").startswith("error: ")
    assert sim.control("fault").startswith("error: ")
    assert sim.control("fault stall -1").startswith("error: ")
    for kind in ("noise", "mute-pump", "mute-probe", "slow-probe", "modbus-exception",
                 "stall", "frozen-probe", "unplug"):
        assert sim.control(f"fault {kind}") == "ok"
        assert sim.state()["fault"] == kind
    assert sim.control("clear") == "ok"
    assert sim.state()["fault"] is None
    # a fault with SECONDS clears itself
    assert sim.control("fault mute-probe 0.3") == "ok"
    assert sim.state()["fault"] == "mute-probe"
    time.sleep(0.6)
    assert sim.state()["fault"] is None
    # load: errors as file:line:col, a good file gives a new beaker
    bad = tmp_path / "bad.yaml"
    bad.write_text("sample_ml: 10\nsmaple: []\n")
    reply = sim.control(f"load {bad}")
    assert reply.startswith(f"error: {bad}:")
    assert f"{bad}:2:1: unknown key 'smaple'" in reply
    assert sim.control(f"load {benchlib.ROOT}/tests/data/drivers/cider.yaml") == "ok"


def test_pump_protocol_and_limits(sim):
    with serial.Serial(sim.pump, 9600, timeout=1) as port:
        assert pump_line(port, "STAT") == "AT 20000 IDLE"
        assert pump_line(port, "HELLO") == "ERR 1 unknown command"
        assert pump_line(port, "DOSE x 5").startswith("ERR 1")
        # the pump knows its stroke: full syringe, cannot fill more
        assert pump_line(port, "VALVE IN") == "OK"
        assert pump_line(port, "FILL 1 1000") == "ERR 3 beyond full stroke"
        assert pump_line(port, "DOSE 10 1000") == "ERR 4 valve at reservoir"
        assert pump_line(port, "VALVE OUT") == "OK"
        assert pump_line(port, "FILL 10 1000") == "ERR 4 valve at outlet"
        assert pump_line(port, "DOSE 20001 1000").startswith("ERR 2")
        # 2000 steps (1 mL) at 4000 steps/s: about 0.5 s of motion
        t0 = time.monotonic()
        assert pump_line(port, "DOSE 2000 4000") == "OK"
        assert pump_line(port, "STAT").endswith("MOVING")
        assert pump_line(port, "DOSE 1 1000") == "BUSY"
        assert sim.state()["moving"] is True
        while pump_line(port, "STAT").endswith("MOVING"):
            assert time.monotonic() - t0 < 5
            time.sleep(0.02)
        took = time.monotonic() - t0
        assert 0.4 < took < 2.0
        assert pump_line(port, "STAT") == "AT 18000 IDLE"
        st = sim.state()
        assert st["dispensed_ml"] == pytest.approx(1.0, abs=1e-9)
        assert st["contents_ml"] == pytest.approx(9.0, abs=1e-9)
        # titrant changes the beaker: more NaOH, higher pH
        assert st["ph"] > 3.0
        # a refill does not put titrant into the beaker
        assert pump_line(port, "VALVE IN") == "OK"
        assert pump_line(port, "FILL 2000 8000") == "OK"
        while pump_line(port, "STAT").endswith("MOVING"):
            time.sleep(0.02)
        assert pump_line(port, "VALVE OUT") == "OK"
        assert sim.state()["dispensed_ml"] == pytest.approx(1.0, abs=1e-9)
        # halt stops a dose short
        assert pump_line(port, "DOSE 20000 2000") == "OK"
        time.sleep(0.2)
        assert pump_line(port, "HALT") == "OK"
        pos = int(pump_line(port, "STAT").split()[1])
        assert 18000 < pos < 20000
        # stall: a motor error on every status until cleared
        assert sim.control("fault stall") == "ok"
        assert pump_line(port, "STAT") == "ERR 5 motor stall"
        assert pump_line(port, "DOSE 10 1000") == "ERR 5 motor stall"
        assert sim.control("clear") == "ok"
        assert pump_line(port, "STAT").startswith("AT ")


def regs_of(sim):
    from pymodbus.client import ModbusTcpClient
    c = ModbusTcpClient("127.0.0.1", port=sim.port, timeout=2)
    assert c.connect()
    try:
        rr = c.read_input_registers(0, 11, slave=1)
        assert not rr.isError(), rr
        return list(rr.registers)
    finally:
        c.close()


def test_registers_follow_the_beaker(sim):
    r = regs_of(sim)
    mv = struct.unpack(">f", struct.pack(">HH", r[0], r[1]))[0]
    ph = struct.unpack(">f", struct.pack(">HH", r[2], r[3]))[0]
    t_c = struct.unpack(">f", struct.pack(">HH", r[4], r[5]))[0]
    assert t_c == pytest.approx(25.0)
    assert r[6] == 0  # status: healthy
    assert ph == pytest.approx(7 - mv / benchlib.nernst_mv(25.0), abs=0.01)
    mv_x10 = struct.unpack(">h", struct.pack(">H", r[8]))[0] / 10.0
    mv_uv = struct.unpack(">i", struct.pack(">HH", r[10], r[9]))[0] / 1000.0  # little order
    assert mv_x10 == pytest.approx(mv, abs=0.06)
    assert mv_uv == pytest.approx(mv, abs=0.002)
    assert sim.state()["mv"] == pytest.approx(mv, abs=1.0)  # noise 0.1 mV RMS
    # the counter rises at 10 Hz ...
    c0 = r[7]
    time.sleep(0.35)
    c1 = regs_of(sim)[7]
    assert 2 <= (c1 - c0) % 65536 <= 6
    # ... and stops with frozen-probe, as do the readings
    assert sim.control("fault frozen-probe") == "ok"
    time.sleep(0.15)
    a = regs_of(sim)
    time.sleep(0.35)
    b = regs_of(sim)
    assert a == b
    assert sim.control("clear") == "ok"
    time.sleep(0.25)
    assert regs_of(sim)[7] != b[7]


def test_modbus_faults_seen_by_pymodbus(sim):
    from pymodbus.client import ModbusTcpClient
    assert sim.control("fault modbus-exception") == "ok"
    c = ModbusTcpClient("127.0.0.1", port=sim.port, timeout=1)
    assert c.connect()
    rr = c.read_input_registers(0, 2, slave=1)
    assert rr.isError() and rr.exception_code == 4  # server device failure
    c.close()
    assert sim.control("clear") == "ok"
    assert len(regs_of(sim)) == 11


def test_stirrer_coil_and_speed(sim):
    from pymodbus.client import ModbusTcpClient
    c = ModbusTcpClient("127.0.0.1", port=sim.port, timeout=2)
    assert c.connect()
    assert not c.write_coil(0, True, slave=1).isError()
    assert not c.write_register(20, 450, slave=1).isError()
    c.close()
    st = sim.state()
    assert st["stirrer"] is True and st["stirrer_rpm"] == 450


def test_config_out_and_token(sim):
    cfg = yaml.safe_load(open(sim.config))
    assert cfg["http"]["listen"] == "127.0.0.1:8470"
    assert cfg["http"]["read_needs_token"] is False
    token = cfg["http"]["token_file"]
    assert token == os.path.join(sim.dir, "token")
    assert stat.S_IMODE(os.stat(token).st_mode) == 0o600
    assert benchlib.HEX_TOKEN.match(open(token).read().strip())
    assert cfg["storage"]["database"] == os.path.join(os.path.realpath(sim.dir), "state",
                                                      "stopcock.db")
    assert cfg["methods_dir"] == os.path.join(benchlib.ROOT, "config", "methods")
    (st,) = cfg["stations"]
    assert st["name"] == "sim1"
    assert st["burette"]["port"] == sim.pump
    assert st["burette"]["driver"] == "pump-serial"
    assert os.path.exists(st["burette"]["profile"])
    assert st["probe"]["port"] == sim.port
    # the same config drives our own drivers with no editing
    dev = benchlib.Devices(sim.config)
    opened = dev.open(3)
    assert [o["status"] for o in opened] == ["ok", "ok", "ok"], opened
    assert dev.do("read")["status"] == "ok"
    assert dev.close() == 0


def test_config_out_passes_the_daemon_check(sim):
    r = subprocess.run([benchlib.build_bin("stopcockd"), "--check-config", "-c", sim.config],
                       capture_output=True, text=True, timeout=20)
    assert r.returncode == 0, r.stderr


def test_listen_flag_and_sigterm(tmp_path):
    s = Sim(tmp_path, extra=("--listen", "127.0.0.1:18471"))
    cfg = yaml.safe_load(open(s.config))
    assert cfg["http"]["listen"] == "127.0.0.1:18471"
    assert s.stop() == 0
    assert not os.path.lexists(s.pump)  # the link goes with the bench
    assert not os.path.exists(s.ctl_path)


def test_bad_arguments_exit_2(tmp_path):
    sim_bin = benchlib.build_bin("stopcock-sim")
    r = subprocess.run([sim_bin, "--scenario", "x.yaml"], capture_output=True, text=True)
    assert r.returncode == 2 and "required" in r.stderr
    bad = tmp_path / "bad.yaml"
    bad.write_text("sample_ml: ten\n")
    r = subprocess.run([sim_bin, "--scenario", str(bad), "--modbus-tcp", "127.0.0.1:0",
                        "--pump-link", str(tmp_path / "p")], capture_output=True, text=True)
    assert r.returncode == 2 and f"{bad}:1:" in r.stderr
