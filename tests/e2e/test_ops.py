"""Operations: the systemd unit, sysusers/tmpfiles files, man pages,
`make install`/`make uninstall`, and the OpenAPI description against a
running daemon.

Nothing here skips: a missing tool fails the test and names the Debian
package that brings it (the Makefile's `make deps` installs them).
"""

import json
import os
import re
import shutil
import signal
import socket
import time
import urllib.error
import urllib.request
from pathlib import Path

import pytest
from common import build_dir, make_install, run  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
UNIT = ROOT / "systemd" / "stopcockd.service"
SYSUSERS = ROOT / "systemd" / "stopcock-sysusers.conf"
TMPFILES = ROOT / "systemd" / "stopcock-tmpfiles.conf"
MAN_PAGES = sorted(p for p in (ROOT / "docs").glob("*.[1-8]"))
OPENAPI = ROOT / "docs" / "openapi.yaml"

# The target of issue 8: `systemd-analyze security --offline=yes` exposure.
EXPOSURE_MAX = 2.0


def need_tool(name, package):
    path = shutil.which(name)
    assert path, f"{name} is missing: install the Debian package {package} (make deps)"
    return path


# ---------------------------------------------------------------- install


@pytest.fixture(scope="module")
def installed(tmp_path_factory):
    """`make install DESTDIR=... PREFIX=/usr` into a fresh directory."""
    return make_install(tmp_path_factory.mktemp("destdir"))


def expected_files():
    """Installed path (relative to DESTDIR) -> (source file or None, mode)."""
    exp = {
        "usr/sbin/stopcockd": (None, 0o755),
        "usr/bin/stopcock": (None, 0o755),
        "usr/bin/stopcock-sim": (None, 0o755),
        "lib/systemd/system/stopcockd.service": (UNIT, 0o644),
        "usr/lib/sysusers.d/stopcock.conf": (SYSUSERS, 0o644),
        "usr/lib/tmpfiles.d/stopcock.conf": (TMPFILES, 0o644),
    }
    for kind in ("methods", "pumps", "changers", "scenarios"):
        for f in sorted((ROOT / "config" / kind).glob("*.yaml")):
            exp[f"usr/share/stopcock/{kind}/{f.name}"] = (f, 0o644)
    example = ROOT / "config" / "stopcockd.yaml"
    if example.exists():
        exp["etc/stopcock/stopcockd.yaml.example"] = (example, 0o644)
    for page in MAN_PAGES:
        section = page.suffix[1:]
        exp[f"usr/share/man/man{section}/{page.name}"] = (page, 0o644)
    # The bench page: the installed daemon finds it in DATADIR/www.
    for f in sorted((ROOT / "daemon" / "server" / "www").glob("*")):
        if f.is_file():
            exp[f"usr/share/stopcock/www/{f.name}"] = (f, 0o644)
    # The user docs the man pages point at (issue 20).
    for f in [ROOT / "README.md", ROOT / "SAFETY.md", OPENAPI,
              *sorted((ROOT / "docs").glob("*.md"))]:
        exp[f"usr/share/doc/stopcock/{f.name}"] = (f, 0o644)
    return exp


def test_install_tree_is_complete(installed):
    exp = expected_files()
    # Every kind of thing the issue lists is there at all (an empty glob in
    # config/ would otherwise pass silently).
    for kind in ("methods", "pumps", "changers", "scenarios", "www"):
        assert any(k.startswith(f"usr/share/stopcock/{kind}/") for k in exp), \
            f"nothing to install in usr/share/stopcock/{kind}/"
    assert len(MAN_PAGES) == 5, [p.name for p in MAN_PAGES]
    for rel, (src, mode) in exp.items():
        p = installed / rel
        assert p.is_file(), f"{rel} is not installed"
        assert (p.stat().st_mode & 0o777) == mode, f"{rel}: mode {oct(p.stat().st_mode)}"
        if src is not None:
            assert p.read_bytes() == src.read_bytes(), f"{rel} differs from {src}"
    assert (installed / "etc/stopcock/methods").is_dir()
    # Nothing unexpected: every installed file is one we know.
    extra = [str(p.relative_to(installed)) for p in installed.rglob("*")
             if p.is_file() and str(p.relative_to(installed)) not in exp]
    assert not extra, f"unexpected installed files: {extra}"


def test_installed_programs_run(installed):
    # The installed binaries are the built ones and start (no missing library).
    for rel in ("usr/sbin/stopcockd", "usr/bin/stopcock"):
        built = build_dir() / "bin" / Path(rel).name
        assert (installed / rel).read_bytes() == built.read_bytes(), rel
    r = run([str(installed / "usr/bin/stopcock"), "check",
             str(installed / "usr/share/stopcock/methods" /
                 sorted(os.listdir(installed / "usr/share/stopcock/methods"))[0])])
    assert r.returncode == 0, f"installed stopcock check failed:\n{r.stdout}{r.stderr}"


def test_uninstall_removes_what_install_put(tmp_path):
    dest = tmp_path / "d"
    args = ["make", "--no-print-directory", f"BUILD={build_dir()}", f"DESTDIR={dest}",
            "PREFIX=/usr"]
    r = run(args + ["install"], cwd=ROOT, timeout=600)
    assert r.returncode == 0, r.stderr
    r = run(args + ["uninstall"], cwd=ROOT)
    assert r.returncode == 0, r.stderr
    left = sorted(str(p.relative_to(dest)) for p in dest.rglob("*") if p.is_file())
    # The example configuration under etc/ stays, as configuration does when a
    # package is removed but not purged (common practice).
    assert all(f.startswith("etc/stopcock/") for f in left), f"left behind: {left}"


# ---------------------------------------------------------------- systemd


def verify_copy(installed, tmp_path):
    """The installed unit with ExecStart= pointing at the installed binary:
    `systemd-analyze verify` checks that the program exists and is
    executable, and a bare name would be looked up in /usr/sbin."""
    text = (installed / "lib/systemd/system/stopcockd.service").read_text()
    assert re.search(r"^ExecStart=stopcockd ", text, re.M), "ExecStart= changed; adjust the test"
    text = re.sub(r"^ExecStart=stopcockd ", f"ExecStart={installed}/usr/sbin/stopcockd ",
                  text, flags=re.M)
    unit = tmp_path / "stopcockd.service"
    unit.write_text(text)
    return unit


def test_unit_passes_systemd_analyze_verify(installed, tmp_path):
    need_tool("systemd-analyze", "systemd")
    need_tool("man", "man-db")
    unit = verify_copy(installed, tmp_path)
    # Documentation=man:... is checked with man(1): point it at the installed pages.
    env = dict(os.environ, MANPATH=str(installed / "usr/share/man"))
    r = run(["systemd-analyze", "verify", str(unit)], env=env)
    assert r.returncode == 0 and r.stderr.strip() == "", \
        f"systemd-analyze verify:\n{r.stdout}{r.stderr}"


def test_unit_verify_catches_a_broken_unit(tmp_path):
    # The check above can fail: a unit naming a missing program does.
    need_tool("systemd-analyze", "systemd")
    bad = tmp_path / "stopcockd.service"
    bad.write_text(UNIT.read_text().replace("ExecStart=stopcockd ",
                                            "ExecStart=/nonexistent/stopcockd "))
    r = run(["systemd-analyze", "--man=no", "verify", str(bad)])
    assert r.returncode != 0 or "nonexistent" in r.stderr


def exposure(unit_path):
    r = run(["systemd-analyze", "security", "--offline=yes", "--no-pager", str(unit_path)])
    m = re.search(r"Overall exposure level for \S+: (\d+(?:\.\d+)?)", r.stdout + r.stderr)
    assert m, f"no exposure level in:\n{r.stdout}{r.stderr}"
    return float(m.group(1)), r.stdout


def test_unit_exposure_within_target():
    need_tool("systemd-analyze", "systemd")
    level, report = exposure(UNIT)
    print(f"systemd-analyze security exposure: {level} (target <= {EXPOSURE_MAX})")
    assert level <= EXPOSURE_MAX, f"exposure {level} > {EXPOSURE_MAX}:\n{report}"


def test_unit_keeps_the_promised_settings():
    text = UNIT.read_text()
    settings = {}
    for line in text.splitlines():
        if "=" in line and not line.startswith("#"):
            k, v = line.split("=", 1)
            settings.setdefault(k, []).append(v)
    want = {
        "Type": "notify", "Restart": "on-failure", "ProtectSystem": "strict",
        "StateDirectory": "stopcock", "ConfigurationDirectory": "stopcock",
        "NoNewPrivileges": "yes", "CapabilityBoundingSet": "", "PrivateTmp": "yes",
        "ProtectHome": "yes", "ProtectKernelTunables": "yes", "ProtectKernelModules": "yes",
        "ProtectKernelLogs": "yes", "ProtectClock": "yes",
        "RestrictAddressFamilies": "AF_UNIX AF_INET AF_INET6",
        "SystemCallFilter": "@system-service", "MemoryDenyWriteExecute": "yes",
        "UMask": "0077", "User": "stopcock",
    }
    for k, v in want.items():
        assert v in settings.get(k, []), f"{k}={v} missing from the unit"
    assert any(s.startswith("char-ttyUSB") for s in settings.get("DeviceAllow", []))
    assert settings.get("WatchdogSec"), "WatchdogSec= missing"


def test_sysusers_creates_user_in_dialout(tmp_path):
    need_tool("systemd-sysusers", "systemd")
    etc = tmp_path / "etc"
    etc.mkdir()
    (etc / "passwd").write_text("root:x:0:0:root:/root:/bin/bash\n")
    (etc / "group").write_text("root:x:0:\ndialout:x:20:\n")
    (etc / "shadow").write_text("root:*:19000:0:99999:7:::\n")
    (etc / "gshadow").write_text("root:*::\ndialout:*::\n")
    r = run(["systemd-sysusers", f"--root={tmp_path}",
             "--replace=/usr/lib/sysusers.d/stopcock.conf", "-"],
            input=SYSUSERS.read_text())
    assert r.returncode == 0, r.stderr
    passwd = (etc / "passwd").read_text()
    group = (etc / "group").read_text()
    assert re.search(r"^stopcock:x:\d+:\d+:[^:]*:/var/lib/stopcock:/usr/sbin/nologin$",
                     passwd, re.M), passwd
    assert re.search(r"^dialout:x:20:stopcock$", group, re.M), group


def test_tmpfiles_lines_parse(tmp_path):
    need_tool("systemd-tmpfiles", "systemd")
    # systemd-tmpfiles resolves user names through the host's NSS even with
    # --root, and this host has no user stopcock: check the syntax with root.
    lines = []
    for line in TMPFILES.read_text().splitlines():
        f = line.split()
        if f and not f[0].startswith("#") and len(f) >= 5:
            f[3:5] = ["root" if x == "stopcock" else x for x in f[3:5]]
            line = " ".join(f)
        lines.append(line)
    text = "\n".join(lines) + "\n"
    r = run(["systemd-tmpfiles", f"--root={tmp_path}", "--create",
             "--replace=/usr/lib/tmpfiles.d/stopcock.conf", "-"], input=text)
    assert r.returncode == 0, r.stderr
    assert (tmp_path / "var/lib/stopcock").is_dir()
    assert (tmp_path / "var/lib/stopcock").stat().st_mode & 0o777 == 0o700
    assert (tmp_path / "etc/stopcock/methods").is_dir()


# ---------------------------------------------------------------- man pages


@pytest.mark.parametrize("page", MAN_PAGES, ids=lambda p: p.name)
def test_man_page_renders_without_warnings(page):
    need_tool("man", "man-db")
    need_tool("groff", "groff-base")
    env = dict(os.environ, MANWIDTH="80", LC_ALL="C.UTF-8")
    src = page.read_text()
    stray = sorted({hex(ord(c)) for c in src if ord(c) < 32 and c not in "\n\t"})
    assert not stray, f"{page.name}: control characters {stray}"
    # --warnings=w: every groff warning, not only the default undefined macros.
    r = run(["man", "--warnings=w", "-l", str(page)], env=env)
    assert r.returncode == 0, r.stderr
    assert r.stderr.strip() == "", f"{page.name}: {r.stderr}"
    # mandb must find the NAME line for whatis/apropos.
    lg = run(["lexgrog", str(page)])
    assert lg.returncode == 0 and page.stem.split(".")[0] in lg.stdout, lg.stdout + lg.stderr
    out = re.sub(r".\x08", "", r.stdout)  # overstrike bold and underline
    for section in ("NAME", "DESCRIPTION", "SEE ALSO"):
        assert re.search(rf"^{section}$", out, re.M), f"{page.name}: no {section} section"


def test_man_page_check_can_fail(tmp_path):
    need_tool("man", "man-db")
    bad = tmp_path / "bad.1"
    bad.write_text(".TH BAD 1\n.SH NAME\nbad \\- x\n.NOSUCHMACRO\n")
    env = dict(os.environ, MANWIDTH="80")
    r = run(["man", "--warnings", "-l", str(bad)], env=env)
    assert "NOSUCHMACRO" in r.stderr


def test_every_program_has_a_man_page():
    names = {p.name for p in MAN_PAGES}
    assert {"stopcockd.8", "stopcock.1", "stopcock-sim.1", "stopcockd.yaml.5",
            "stopcock-method.5"} <= names


# ---------------------------------------------------------------- sd_notify


def test_daemon_talks_to_systemd(tmp_path):
    """stopcockd under a stand-in for systemd: NOTIFY_SOCKET is a datagram
    socket of ours, WATCHDOG_USEC asks for pings. READY=1 comes once, with
    the station's devices answering; WATCHDOG=1 keeps coming while the
    stations run; SIGHUP gives RELOADING=1 then READY=1; SIGTERM gives
    STOPPING=1 and exit status 0."""
    import json
    import select
    from test_openapi import bench

    sock_path = tmp_path / "notify.sock"
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(str(sock_path))
    got = []  # (monotonic s, message)

    def drain(seconds):
        end = time.monotonic() + seconds
        while time.monotonic() < end:
            r, _, _ = select.select([sock], [], [], 0.05)
            if r:
                got.append((time.monotonic(), sock.recv(4096).decode()))

    # 6 s (station heartbeats may be 3 s old): room for a loaded test machine,
    # where an fsync can stall a station thread for a second; production uses
    # WatchdogSec=30s.
    watchdog_s = 6.0
    env = dict(os.environ, NOTIFY_SOCKET=str(sock_path),
               WATCHDOG_USEC=str(int(watchdog_s * 1e6)))
    env.pop("WATCHDOG_PID", None)
    try:
        with bench(tmp_path, env) as (api, d):
            drain(0.5)
            # READY=1 must have come by the time the daemon answers, or soon after.
            end = time.monotonic() + 20
            while not any(m == "READY=1" for _, m in got) and time.monotonic() < end:
                drain(0.2)
            ready = [t for t, m in got if m == "READY=1"]
            assert len(ready) == 1, got
            st, _, body = api.call("get", "/v1/stations")
            states = [s["state"] for s in json.loads(body)["stations"]]
            assert "offline" not in states, f"READY=1 with a station offline: {states}"
            # Pings: the daemon looks every WatchdogSec/4 and pings when every
            # station checked in within WatchdogSec/2.
            # systemd kills the service when a whole WatchdogSec passes without
            # one; the daemon aims at one every WatchdogSec/4.
            t0 = time.monotonic()
            drain(1.5 * watchdog_s)
            pings = [t for t, m in got if m == "WATCHDOG=1" and t >= t0]
            assert len(pings) >= 3, f"{len(pings)} pings in {1.5 * watchdog_s} s: {got[-10:]}"
            gaps = [b - a for a, b in zip(pings, pings[1:])] + [pings[0] - t0]
            assert max(gaps) < watchdog_s, f"longest gap between pings {max(gaps):.2f} s"
            print(f"sd_notify: {len(pings)} pings in {1.5 * watchdog_s:.0f} s, "
                  f"longest gap {max(gaps):.3f} s (WatchdogSec {watchdog_s} s)")
            assert any(m.startswith("STATUS=") for _, m in got), got
            # SIGHUP: reload, then ready again.
            n = len(got)
            d.send_signal(signal.SIGHUP)
            drain(1.5)
            after = [m for _, m in got[n:] if m in ("RELOADING=1", "READY=1")]
            assert after[:2] == ["RELOADING=1", "READY=1"], got[n:]
            # SIGTERM: STOPPING=1, then a clean exit.
            n = len(got)
            d.send_signal(signal.SIGTERM)
            rc = d.wait(timeout=15)
            drain(0.3)
            assert rc == 0, (tmp_path / "d.log").read_text()
            assert "STOPPING=1" in [m for _, m in got[n:]], got[n:]
    finally:
        sock.close()


# ---------------------------------------------------------------- examples in man pages


def man_example(page, first_key):
    """The EXAMPLE section's YAML of a rendered man page, from its first key."""
    env = dict(os.environ, MANWIDTH="200", LC_ALL="C.UTF-8")
    out = re.sub(r".\x08", "", run(["man", "-l", str(page)], env=env).stdout)
    m = re.search(r"^EXAMPLES?\n(.*?)^\S", out, re.M | re.S)
    assert m, f"{page.name}: no EXAMPLE section"
    lines = m.group(1).splitlines()
    start = next(i for i, ln in enumerate(lines) if ln.strip().startswith(first_key))
    indent = len(lines[start]) - len(lines[start].lstrip())
    body = []
    for ln in lines[start:]:
        if ln.strip() and len(ln) - len(ln.lstrip()) < indent:
            break  # the prose after the example
        body.append(ln[indent:])
    while body and not body[-1].strip():
        body.pop()
    return "\n".join(body) + "\n"


def test_config_example_in_man_page_is_valid(tmp_path):
    text = man_example(ROOT / "docs" / "stopcockd.yaml.5", "http:")
    token = tmp_path / "token"
    token.write_text("lims:" + "f" * 24 + "\n")
    text = text.replace("/etc/stopcock/token", str(token)) \
        .replace("/var/lib/stopcock/stopcock.db", str(tmp_path / "x.db")) \
        .replace("/etc/stopcock/methods", str(ROOT / "config" / "methods"))
    cfg = tmp_path / "stopcockd.yaml"
    cfg.write_text(text)
    r = run([str(build_dir() / "bin" / "stopcockd"), "--check-config", "-c", str(cfg)])
    assert r.returncode == 0, f"{text}\n{r.stdout}{r.stderr}"


def test_method_example_in_man_page_is_valid(tmp_path):
    text = man_example(ROOT / "docs" / "stopcock-method.5", "method:")
    f = tmp_path / "cider-acidity.yaml"
    f.write_text(text)
    r = run([str(build_dir() / "bin" / "stopcock"), "check", str(f)])
    assert r.returncode == 0, f"{text}\n{r.stdout}{r.stderr}"
    assert "revision 3" in r.stdout


def test_installed_example_config_is_valid(installed, tmp_path):
    example = installed / "etc/stopcock/stopcockd.yaml.example"
    assert example.is_file(), "no example configuration installed (config/stopcockd.yaml)"
    token = tmp_path / "token"
    token.write_text("lims:" + "e" * 24 + "\n")
    text = example.read_text().replace("/etc/stopcock/token", str(token)) \
        .replace("/var/lib/stopcock/stopcock.db", str(tmp_path / "x.db")) \
        .replace("/etc/stopcock/methods", str(installed / "usr/share/stopcock/methods"))
    cfg = tmp_path / "stopcockd.yaml"
    cfg.write_text(text)
    r = run([str(installed / "usr/sbin/stopcockd"), "--check-config", "-c", str(cfg)])
    assert r.returncode == 0, f"{r.stdout}{r.stderr}"


def test_installed_predict_example_runs(installed):
    # stopcock(1)'s EXAMPLES, against the installed data files.
    share = installed / "usr/share/stopcock"
    r = run([str(installed / "usr/bin/stopcock"), "predict",
             str(share / "methods/cider-acidity.yaml"),
             "--scenario", str(share / "scenarios/cider-acidity.yaml"), "--amount", "10"])
    assert r.returncode == 0, r.stdout + r.stderr
    assert re.search(r"^endpoint 1: ", r.stdout, re.M), r.stdout


# ---------------------------------------------------------------- system calls


def syscall_group(name):
    """The system calls of a systemd group (@name), groups expanded."""
    r = run(["systemd-analyze", "syscall-filter", name])
    assert r.returncode == 0, r.stderr
    out = set()
    for line in r.stdout.splitlines()[1:]:
        w = line.strip()
        if not w or w.startswith("#"):
            continue
        out |= syscall_group(w) if w.startswith("@") else {w}
    return out


def test_daemon_system_calls_fit_the_unit_filter(tmp_path):
    """Run stopcockd under strace through start-up, HTTP reads and writes, a
    run, an abort, a calibration step, a reload and a stop, and check every
    system call it made against the unit's SystemCallFilter= lines. A call outside
    would fail with EPERM under systemd (SystemCallErrorNumber=EPERM). The same
    trace checks RestrictAddressFamilies=, MemoryDenyWriteExecute= and that
    the daemon writes nowhere ProtectSystem=strict would refuse."""
    import json
    from test_openapi import MV_METHOD, bench

    strace = need_tool("strace", "strace")
    need_tool("systemd-analyze", "systemd")
    trace = tmp_path / "trace.txt"
    with bench(tmp_path, wrap=[strace, "-f", "-qq", "-o", str(trace)]) as (api, st):
        children = Path(f"/proc/{st.pid}/task/{st.pid}/children").read_text().split()
        assert len(children) == 1, children
        daemon_pid = int(children[0])
        assert api.call("get", "/v1/stations")[0] == 200
        assert api.call("put", "/v1/methods/openapi-mv", MV_METHOD.encode(),
                        ctype="application/yaml")[0] == 201
        s, _, body = api.call("post", "/v1/runs", {"station": "sim1", "method": "openapi-mv",
                                                   "sample_id": "FWC-strace", "amount": 10})
        assert s == 201, body
        rid = json.loads(body)["id"]
        time.sleep(3)  # stirring, the first reading and point
        for path in (f"/v1/runs/{rid}", f"/v1/runs/{rid}/points",
                     f"/v1/runs/{rid}/points?format=csv", f"/v1/runs/{rid}/curve.svg",
                     "/v1/results?after=0", "/metrics"):
            assert api.call("get", path)[0] == 200, path
        assert api.call("post", f"/v1/runs/{rid}/abort")[0] in (200, 409)
        time.sleep(0.5)
        s, _, body = api.call("post", "/v1/calibrations",
                              {"station": "sim1", "buffers": [4.01, 7.00]})
        assert s == 201, body
        cid = json.loads(body)["id"]
        assert api.call("post", f"/v1/calibrations/{cid}/next")[0] == 200
        os.kill(daemon_pid, signal.SIGHUP)
        time.sleep(1)
        assert api.call("get", "/v1/health")[0] == 200
        os.kill(daemon_pid, signal.SIGTERM)
        assert st.wait(timeout=20) == 0
    used = set()
    for line in trace.read_text().splitlines():
        m = re.match(r"^\d+\s+(?:<\.\.\. (\w+) resumed>|(\w+)\()", line)
        if m:
            used.add(m.group(1) or m.group(2))
    assert len(used) > 20, f"too few system calls traced: {sorted(used)}"
    # The unit's filter, assignment by assignment as systemd reads them: the
    # first (an allow list) sets it, "~..." ones remove, later plain ones add.
    allowed = None
    for line in UNIT.read_text().splitlines():
        if not line.startswith("SystemCallFilter="):
            continue
        value = line.split("=", 1)[1]
        deny = value.startswith("~")
        names = set()
        for w in value.lstrip("~").split():
            names |= syscall_group(w) if w.startswith("@") else {w}
        if allowed is None:
            assert not deny, "the unit's first SystemCallFilter= must be an allow list"
            allowed = names
        elif deny:
            allowed -= names
        else:
            allowed |= names
    assert allowed, "no SystemCallFilter= in the unit"
    # SQLite chowns its journal files to the database's owner only when it runs
    # as root (this test may; the unit never does).
    if os.geteuid() == 0:
        allowed |= {"fchown", "fchownat", "chown"}
    outside = sorted(used - allowed)
    print(f"stopcockd used {len(used)} distinct system calls; outside the filter: {outside}")
    assert not outside, f"system calls the unit's filter would refuse: {outside}"

    text = trace.read_text()
    # RestrictAddressFamilies=AF_UNIX AF_INET AF_INET6
    families = set(re.findall(r"\bsocket\((AF_\w+)", text))
    assert "AF_INET" in families, families  # the Modbus TCP transmitter
    assert families <= {"AF_UNIX", "AF_INET", "AF_INET6"}, families
    # MemoryDenyWriteExecute=yes refuses writable+executable mappings and any
    # mprotect() that adds PROT_EXEC.
    wx = [ln for ln in text.splitlines()
          if re.search(r"\b(mmap|mprotect|pkey_mprotect)\(", ln) and "PROT_EXEC" in ln
          and ("PROT_WRITE" in ln or "mprotect(" in ln)]
    assert not wx, wx[:3]
    # ProtectSystem=strict: the daemon writes only below its state directory
    # (here tmp_path, which also holds the pump's pty link) and to devices.
    written = set(re.findall(
        r'\b(?:open|openat)\((?:AT_FDCWD, |\d+, )?"([^"]+)", [^)]*O_(?:WRONLY|RDWR|CREAT)',
        text))
    written |= set(re.findall(
        r'\b(?:unlink|unlinkat|rename|renameat2?|mkdir|mkdirat|rmdir)\((?:AT_FDCWD, |\d+, )?'
        r'"([^"]+)"', text))
    assert any(w.endswith("stopcock.db") for w in written), sorted(written)
    bad = sorted(w for w in written
                 if not (w.startswith(str(tmp_path) + "/") or w.startswith("/dev/")))
    assert not bad, f"writes outside the state directory: {bad}"
