"""The C drivers against real processes: the pump driver over the simulator's
pty, the probe driver over Modbus TCP and RTU, the stirrer; every fault kind
gives its typed error within the driver's deadline and recovers after
`clear`; and the probe driver reads an independent pymodbus server."""
import os
import socket
import subprocess
import sys
import time

import pytest

import benchlib  # noqa: E402
from benchlib import Devices, Sim  # noqa: E402

# Deadlines from the configs below: pump timeout_ms 300 with 2 retries, so a
# call takes at most 3 x 0.3 s (a dose asks the status first: the same);
# probe response_timeout_ms 200 with 1 retry, each failed attempt followed by
# one response timeout of waiting out a late reply: 2 x 0.4 s. The slack
# covers process scheduling, not protocol time.
PUMP_DEADLINE_S = 3 * 0.3
PROBE_DEADLINE_S = 2 * (0.2 + 0.2)
SLACK_S = 0.4


@pytest.fixture
def bench(tmp_path):
    os.makedirs(tmp_path / "sim")
    sim = Sim(tmp_path / "sim", rtu=True)
    cfg = benchlib.station_config(
        tmp_path / "station.yaml", burette=benchlib.sim_pump_cfg(sim),
        probe=benchlib.sim_probe_tcp_cfg(sim),
        stirrer=(f"{{driver: stirrer-modbus, transport: tcp, host: 127.0.0.1, "
                 f"port: {sim.port}, coil: 0, speed_register: 20, rpm: 300}}"))
    dev = Devices(cfg)
    opened = dev.open(3)
    assert [o["status"] for o in opened] == ["ok", "ok", "ok"], opened
    yield sim, dev
    assert dev.close() == 0
    assert sim.stop() == 0


def test_dose_refill_and_readings(bench):
    sim, dev = bench
    assert dev.opened[0]["capacity_ml"] == 10.0 and dev.opened[0]["steps"] == 20000
    r = dev.do("read")
    assert r["status"] == "ok"
    assert r["mv"] == pytest.approx(sim.state()["mv"], abs=1.0)
    assert r["temperature_c"] == pytest.approx(25.0)
    ph0 = sim.state()["ph"]
    assert dev.do("dose 0.5")["status"] == "ok"
    r = dev.do("wait 10")
    assert r["status"] == "ok" and r["moving"] is False
    assert r["dispensed_ml"] == pytest.approx(0.5, abs=1e-9)
    assert r["contents_ml"] == pytest.approx(9.5, abs=1e-9)
    st = sim.state()
    assert st["dispensed_ml"] == pytest.approx(0.5, abs=1e-9)
    assert st["ph"] > ph0
    # more than the syringe holds: a config error naming the refill
    r = dev.do("dose 9.7")
    assert r["status"] == "config" and "refill" in r["error"]
    assert dev.do("refill")["status"] == "ok"
    r = dev.do("wait 10")
    assert r["status"] == "ok" and not r["moving"]
    assert r["contents_ml"] == pytest.approx(10.0, abs=1e-9)
    assert r["dispensed_ml"] == pytest.approx(0.5, abs=1e-9)
    assert sim.state()["valve"] == "out"
    assert sim.state()["dispensed_ml"] == pytest.approx(0.5, abs=1e-9)


def test_stirrer(bench):
    sim, dev = bench
    assert dev.do("stir on 250")["status"] == "ok"
    st = sim.state()
    assert st["stirrer"] is True and st["stirrer_rpm"] == 250
    assert dev.do("stir on")["status"] == "ok"  # default speed from the config
    assert sim.state()["stirrer_rpm"] == 300
    assert dev.do("stir off")["status"] == "ok"
    st = sim.state()
    assert st["stirrer"] is False and st["stirrer_rpm"] == 0


# fault kind -> (command, typed error, deadline)
FAULTS = [
    ("mute-pump", "status", "timeout", PUMP_DEADLINE_S),
    ("stall", "status", "device_error", PUMP_DEADLINE_S),
    ("unplug", "status", "unplugged", PUMP_DEADLINE_S),
    ("unplug", "read", "unplugged", PROBE_DEADLINE_S),
    ("mute-probe", "read", "timeout", PROBE_DEADLINE_S),
    ("slow-probe", "read", "timeout", PROBE_DEADLINE_S),
    ("modbus-exception", "read", "device_error", PROBE_DEADLINE_S),
]


@pytest.mark.parametrize("kind,cmd,error,deadline_s", FAULTS)
def test_fault_gives_typed_error_and_recovers(bench, kind, cmd, error, deadline_s):
    sim, dev = bench
    assert dev.do(cmd)["status"] == "ok"
    assert sim.control(f"fault {kind}") == "ok"
    time.sleep(0.1)  # the sim's threads notice within one 10-50 ms loop
    for _ in range(2):
        r = dev.do(cmd)
        assert r["status"] == error, r
        assert r["ms"] / 1000.0 <= deadline_s + SLACK_S, r
    assert sim.control("clear") == "ok"
    r = dev.until_ok(cmd, within_s=3.0)
    assert r["status"] == "ok", r


def test_mute_pump_dose_times_out_without_moving(bench):
    sim, dev = bench
    assert sim.control("fault mute-pump") == "ok"
    r = dev.do("dose 0.2")
    assert r["status"] == "timeout"
    assert r["ms"] / 1000.0 <= PUMP_DEADLINE_S + SLACK_S
    assert sim.control("clear") == "ok"
    r = dev.until_ok("status")
    assert r["dispensed_ml"] == 0.0 and sim.state()["dispensed_ml"] == 0.0


def test_frozen_probe_detected_by_counter(bench):
    sim, dev = bench
    assert dev.do("read")["status"] == "ok"
    assert sim.control("fault frozen-probe") == "ok"
    # frozen_after_s is 1.0 in the config: keep reading until it is noticed
    t0 = time.monotonic()
    while True:
        r = dev.do("read")
        if r["status"] != "ok":
            break
        assert time.monotonic() - t0 < 3.0, "frozen registers not noticed"
        time.sleep(0.1)
    assert r["status"] == "device_error" and "frozen" in r["error"]
    assert time.monotonic() - t0 >= 0.9
    assert sim.control("clear") == "ok"
    assert dev.until_ok("read")["status"] == "ok"


def test_noise_is_survived_and_never_doubles_a_dose(bench):
    sim, dev = bench
    assert sim.control("fault noise") == "ok"
    results = [dev.do("status") for _ in range(15)]
    for r in results:
        assert r["status"] in ("ok", "bad_reply", "timeout"), r
        assert r["ms"] / 1000.0 <= PUMP_DEADLINE_S + SLACK_S
    assert sum(r["status"] == "ok" for r in results) >= 12
    for _ in range(3):
        r = dev.do("dose 0.1")
        assert r["status"] == "ok", r
        r = dev.do("wait 5")
        assert r["status"] in ("ok", "bad_reply", "timeout")
    assert sim.control("clear") == "ok"
    r = dev.do("wait 5")
    assert r["status"] == "ok" and not r["moving"]
    assert r["dispensed_ml"] == pytest.approx(0.3, abs=1e-9)
    assert sim.state()["dispensed_ml"] == pytest.approx(0.3, abs=1e-9)


def test_fault_with_seconds_recovers_by_itself(bench):
    sim, dev = bench
    assert sim.control("fault mute-probe 0.5") == "ok"
    time.sleep(0.05)
    assert dev.do("read")["status"] == "timeout"
    time.sleep(0.6)
    assert dev.until_ok("read", within_s=2.0)["status"] == "ok"


@pytest.fixture
def rtu_bench(tmp_path):
    os.makedirs(tmp_path / "sim")
    sim = Sim(tmp_path / "sim", rtu=True)
    cfg = benchlib.station_config(tmp_path / "station.yaml",
                                  probe=benchlib.sim_probe_rtu_cfg(sim))
    dev = Devices(cfg)
    assert dev.open(1)[0]["status"] == "ok"
    yield sim, dev
    assert dev.close() == 0
    assert sim.stop() == 0


@pytest.mark.parametrize("kind,error", [("mute-probe", "timeout"),
                                        ("slow-probe", "timeout"),
                                        ("modbus-exception", "device_error"),
                                        ("unplug", "unplugged")])
def test_rtu_probe_faults(rtu_bench, kind, error):
    sim, dev = rtu_bench
    r = dev.do("read")
    assert r["status"] == "ok", r
    assert r["mv"] == pytest.approx(sim.state()["mv"], abs=1.0)
    assert r["ph"] == pytest.approx(sim.state()["ph"], abs=0.05)
    assert sim.control(f"fault {kind}") == "ok"
    time.sleep(0.15)
    r = dev.do("read")
    assert r["status"] == error, r
    assert r["ms"] / 1000.0 <= PROBE_DEADLINE_S + SLACK_S
    assert sim.control("clear") == "ok"
    assert dev.until_ok("read", within_s=4.0)["status"] == "ok"


@pytest.fixture
def pymodbus_port():
    port = benchlib.free_port()
    server = os.path.join(os.path.dirname(__file__), "pymodbus_server.py")
    proc = subprocess.Popen(["/usr/bin/python3", server, str(port)],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    t0 = time.monotonic()
    while True:
        try:
            socket.create_connection(("127.0.0.1", port), timeout=0.2).close()
            break
        except OSError:
            assert time.monotonic() - t0 < 15, "pymodbus server did not start"
            time.sleep(0.1)
    yield port
    proc.terminate()
    proc.wait(10)


def pymodbus_probe(port, status_mask, temp_addr=110, temp_scale=0.1):
    return (f"{{driver: probe-modbus, transport: tcp, host: 127.0.0.1, port: {port}, "
            f"unit: 7, response_timeout_ms: 500, registers: {{"
            f"mv: {{table: holding, address: 100, type: float32, word_order: little}}, "
            f"temperature_c: {{table: holding, address: {temp_addr}, type: int16, "
            f"scale: {temp_scale}}}, "
            f"ph: {{table: input, address: 5, type: uint16, scale: 0.01}}, "
            f"status: {{table: input, address: 30, type: uint16, "
            f"error_mask: {status_mask}}}}}}}")


def test_probe_reads_independent_pymodbus_server(tmp_path, pymodbus_port):
    # the server holds: mV -123.25 as little-word-order float32 at holding 100,
    # 25.3 degC as int16 253 x 0.1 at holding 110, pH 7.12 as uint16 712 x 0.01
    # at input 5, status 0x0002 at input 30 (pymodbus_server.py)
    cfg = benchlib.station_config(tmp_path / "a.yaml", probe=pymodbus_probe(pymodbus_port, 4))
    dev = Devices(cfg)
    assert dev.open(1)[0]["status"] == "ok"
    r = dev.do("read")
    assert r["status"] == "ok", r
    assert r["mv"] == pytest.approx(-123.25, abs=1e-9)
    assert r["temperature_c"] == pytest.approx(25.3, abs=1e-9)
    assert r["ph"] == pytest.approx(7.12, abs=1e-9)
    assert dev.close() == 0
    # registers 900 words apart need two requests; int16 sign kept (-40 x 1)
    cfg = benchlib.station_config(tmp_path / "b.yaml",
                                  probe=pymodbus_probe(pymodbus_port, 4, 1000, 1))
    dev = Devices(cfg)
    dev.open(1)
    r = dev.do("read")
    assert r["status"] == "ok" and r["temperature_c"] == -40
    assert dev.close() == 0
    # status bit 1 inside the error mask: a device error
    cfg = benchlib.station_config(tmp_path / "c.yaml", probe=pymodbus_probe(pymodbus_port, 2))
    dev = Devices(cfg)
    dev.open(1)
    r = dev.do("read")
    assert r["status"] == "device_error" and "0x0002" in r["error"]
    assert dev.close() == 0
    # a wrong unit id: the server does not answer that unit -> no good reply
    bad = pymodbus_probe(pymodbus_port, 4).replace("unit: 7", "unit: 9")
    cfg = benchlib.station_config(tmp_path / "d.yaml", probe=bad)
    dev = Devices(cfg)
    dev.open(1)
    r = dev.do("read")
    assert r["status"] in ("timeout", "device_error", "bad_reply"), r
    assert r["ms"] < 2 * (500 + 500) + 400
    assert dev.close() == 0


def test_config_errors_have_marks(tmp_path):
    cfg = tmp_path / "bad.yaml"
    cfg.write_text(
        "stations:\n"
        "  - name: t1\n"
        "    burette: {driver: pump-serial, port: /dev/null, profile: nosuch, baud: fast}\n"
        "    probe: {driver: probe-modbus, transport: tcp, host: h, registers: {mv: "
        "{address: 0, type: float64}}, timout_ms: 3}\n"
        "    stirrer: {driver: stirrer-serial}\n")
    r = subprocess.run([benchlib.build_bin("stopcock"), "ports", "--test", str(cfg)],
                       capture_output=True, text=True, timeout=20, input="")
    assert r.returncode == 2
    err = r.stderr
    assert f"{cfg}:3:" in err and "nosuch" in err and "not found" in err
    assert "baud" in err
    assert f"{cfg}:4:" in err and "float64" in err
    assert "timout_ms" in err
    assert f"{cfg}:5:" in err and "unknown stirrer driver 'stirrer-serial'" in err
    assert "stirrer-modbus" in err  # the known ones are listed


def test_ports_lists_or_says_none():
    r = subprocess.run([benchlib.build_bin("stopcock"), "ports"], capture_output=True,
                       text=True, timeout=20)
    assert r.returncode == 0
    assert r.stdout.strip(), "stopcock ports printed nothing"
    assert ("no serial ports found" in r.stdout) or r.stdout.startswith("/dev/")


def test_ports_test_writes_utf8_text_as_it_is(tmp_path):
    # A port name a lab wrote in its own language: the error names it, and the
    # JSON line gives it back as written. Before, every byte of UTF-8 came out
    # as its own \u00XX escape ("Waage-Küche" read back as "Waage-KÃ¼che").
    port = str(tmp_path / "Waage-Küche-pumpe")
    cfg = benchlib.station_config(
        tmp_path / "station.yaml",
        burette=(f"{{driver: pump-serial, port: '{port}', timeout_ms: 100, retries: 0, "
                 f"profile: {benchlib.ROOT}/config/pumps/sim.yaml}}"))
    dev = Devices(cfg)
    opened = dev.open(1)
    assert opened[0]["status"] != "ok"
    assert port in opened[0]["error"], opened[0]
    assert dev.close() == 0
