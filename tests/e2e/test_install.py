"""Issue 20, "Install": the *installed* programs of a DESTDIR install with
PREFIX=/usr use /usr's data folder (found beside themselves, not the
/usr/local compiled in), pump profiles are found wherever a check is run
from, the man pages point at docs that are installed, and token-file problems
carry a real line number.

Each test walks what an administrator does; none runs a program from the
build folder except `make install` itself.
"""

import os
import re
import socket
import stat
import subprocess
import time
import urllib.request
from pathlib import Path

import pytest
from common import build_dir, free_port, make_install, run  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def dest(tmp_path_factory):
    return make_install(tmp_path_factory.mktemp("destdir"))


def token_command(dest):
    """The command stopcockd.yaml(5) gives for a random token, as installed."""
    page = (dest / "usr/share/man/man5/stopcockd.yaml.5").read_text()
    sec = page[page.index(".SH TOKEN FILE"):]
    ex = re.search(r"\.EX\n(.*?)\.EE", sec, re.S).group(1)
    # roff escapes back to shell text: \- is -, \\ is \, \e is a backslash.
    text = ex.replace("\\-", "-").replace("\\e", "\\").replace("\\\\", "\\")
    first = re.search(r"^sudo (sh -c .*?/etc/stopcock/token')", text, re.S | re.M)
    assert first, f"no token command in stopcockd.yaml(5):\n{text}"
    return first.group(1)


def admin_config(dest, tmp_path):
    """The installed example, copied as the man page says, with its /etc and
    /var paths moved under DESTDIR (nothing is installed at / by the test)."""
    text = (dest / "etc/stopcock/stopcockd.yaml.example").read_text()
    text = text.replace("/etc/stopcock/", f"{dest}/etc/stopcock/")
    text = text.replace("/var/lib/stopcock/", f"{tmp_path}/")
    cfg = dest / "etc/stopcock/stopcockd.yaml"
    cfg.write_text(text)
    return cfg


def test_installed_daemon_checks_the_installed_example(dest, tmp_path):
    cfg = admin_config(dest, tmp_path)
    token = dest / "etc/stopcock/token"
    # Before the token exists: the complaint names the config line, not line 0.
    r = run([str(dest / "usr/sbin/stopcockd"), "--check-config", "-c", str(cfg)], cwd=tmp_path)
    assert r.returncode == 2, r.stdout + r.stderr
    assert "pump profile" not in r.stderr, r.stderr
    assert "/usr/local" not in r.stderr, r.stderr
    line = next(i for i, s in enumerate(cfg.read_text().splitlines(), 1) if "token_file:" in s)
    assert re.search(rf"^{re.escape(str(cfg))}:{line}:\d+: {re.escape(str(token))}: "
                     r"cannot read the token file", r.stderr, re.M), r.stderr
    assert ":0:0:" not in r.stderr, r.stderr
    # The documented command makes a good token file (sudo and chgrp aside).
    cmd = token_command(dest).replace("/etc/stopcock/token", str(token))
    r = run(["bash", "-c", cmd])
    assert r.returncode == 0, r.stderr
    assert stat.S_IMODE(token.stat().st_mode) & 0o007 == 0, oct(token.stat().st_mode)
    assert re.fullmatch(r"lims:\S{16,}\n", token.read_text()), token.read_text()
    r = run([str(dest / "usr/sbin/stopcockd"), "--check-config", "-c", str(cfg)], cwd=tmp_path)
    assert r.returncode == 0, r.stderr
    assert "ok (1 station)" in r.stdout


def test_token_file_errors_carry_their_line(dest, tmp_path):
    cfg = admin_config(dest, tmp_path)
    token = dest / "etc/stopcock/token"
    token.write_text("# holders\nlims:0123456789abcdef0123\n\nshort:abc\n")
    r = run([str(dest / "usr/sbin/stopcockd"), "--check-config", "-c", str(cfg)], cwd=tmp_path)
    assert r.returncode == 2
    assert re.search(rf"^{re.escape(str(token))}:4:\d+: .*16 to 255", r.stderr, re.M), r.stderr


def test_installed_sim_writes_the_installed_methods_dir(dest, tmp_path):
    sim = dest / "usr/bin/stopcock-sim"
    scenario = dest / "usr/share/stopcock/scenarios/cider-acidity.yaml"
    out = tmp_path / "stopcockd.yaml"
    http = free_port()
    p = subprocess.Popen([str(sim), "--scenario", str(scenario), "--modbus-tcp", f"127.0.0.1:{free_port()}",
                          "--listen", f"127.0.0.1:{http}",
                          "--pump-link", str(tmp_path / "pump"), "--config-out", str(out),
                          "--state-dir", str(tmp_path / "state")],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        assert p.stdout.readline().strip() == "ready", p.stderr.read()
        text = out.read_text()
        # The installed daemon serves the installed bench page.
        d = subprocess.Popen([str(dest / "usr/sbin/stopcockd"), "-c", str(out)], cwd="/",
                             stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        try:
            page = None
            for _ in range(100):
                try:
                    page = urllib.request.urlopen(f"http://127.0.0.1:{http}/",
                                                  timeout=2).read()
                    break
                except OSError:
                    assert d.poll() is None, d.stderr.read()
                    time.sleep(0.1)
            assert page and page == (dest / "usr/share/stopcock/www/index.html").read_bytes()
        finally:
            d.terminate()
            d.wait(timeout=20)
            log = d.stderr.read()
        assert f"serving the bench page from {dest}/usr/share/stopcock/www" in log, log
    finally:
        p.terminate()
        p.wait(timeout=10)
    share = dest / "usr/share/stopcock"
    assert f"methods_dir: {share}/methods" in text, text
    assert f"profile: {share}/pumps/sim.yaml" in text, text
    assert "/usr/local" not in text
    # And the installed daemon accepts what the installed simulator wrote.
    r = run([str(dest / "usr/sbin/stopcockd"), "--check-config", "-c", str(out)], cwd="/")
    assert r.returncode == 0, r.stderr


def test_check_finds_pump_profiles_from_any_folder(tmp_path):
    # The repository's example config, checked from an unrelated folder.
    stopcock = build_dir() / "bin" / "stopcock"
    r = run([str(stopcock), "check", "-c", str(ROOT / "config/stopcockd.yaml"),
             str(ROOT / "config/methods/cider-acidity.yaml")], cwd=tmp_path)
    assert r.returncode == 0, r.stdout + r.stderr
    assert "pump profile" not in r.stderr
    # A copy of the config with a pumps/ folder beside it finds its own profile.
    (tmp_path / "site/pumps").mkdir(parents=True)
    (tmp_path / "site/pumps/house-pump.yaml").write_bytes(
        (ROOT / "config/pumps/generic-ascii.yaml").read_bytes())
    cfg = (ROOT / "config/stopcockd.yaml").read_text().replace(
        "profile: generic-ascii", "profile: house-pump")
    (tmp_path / "site/stopcockd.yaml").write_text(cfg)
    r = run([str(stopcock), "check", "-c", "site/stopcockd.yaml",
             str(ROOT / "config/methods/cider-acidity.yaml")], cwd=tmp_path)
    assert r.returncode == 0, r.stdout + r.stderr


def test_man_pages_point_at_installed_docs(dest):
    pages = list((dest / "usr/share/man").rglob("*.[1-8]"))
    assert pages
    for page in pages:
        text = page.read_text()
        assert "of the source distribution." not in text, page.name
        for ref in re.findall(r"/usr/share/doc/stopcock/([\w.-]+)", text):
            assert (dest / "usr/share/doc/stopcock" / ref).is_file(), \
                f"{page.name} points at {ref}, which is not installed"
    stopcockd8 = (dest / "usr/share/man/man8/stopcockd.8").read_text()
    for doc in ("openapi.yaml", "operations.md", "SAFETY.md"):
        assert f"/usr/share/doc/stopcock/{doc}" in stopcockd8, doc
