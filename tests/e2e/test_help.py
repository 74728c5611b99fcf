"""Help, version and argument errors as a newcomer meets them (issue 20, "Help and hints").

Each test runs the built program the way a user types it and checks what they read.
"""
import os
import re
import subprocess

import pytest

import common

ROOT = str(common.ROOT)


def build_dir():
    b = os.environ.get("STOPCOCK_BUILD")
    assert b, "STOPCOCK_BUILD must name the build directory (make pytest sets it)"
    return b


def prog(name):
    return os.path.join(build_dir(), "bin", name)


def run(*args):
    return subprocess.run(list(args), capture_output=True, text=True, timeout=30)


def long_options(text):
    """Every --long-option named in a text (help output or a man page's roff)."""
    text = text.replace("\\-", "-")
    return set(re.findall(r"(?<![\w-])--([a-z][a-z0-9-]*)", text))


def test_sim_version_prints_version_and_exits_0():
    r = run(prog("stopcock-sim"), "--version")
    assert r.returncode == 0, r.stderr
    assert re.fullmatch(r"stopcock-sim \d+\.\d+\.\d+\n", r.stdout), r.stdout


def test_sim_unknown_option_is_a_clear_error_with_status_2():
    r = run(prog("stopcock-sim"), "--scenaro", "x.yaml")
    assert r.returncode == 2
    assert "--scenaro" in r.stderr
    assert "--help" in r.stderr
    # a short pointer, not the whole usage text repeated on every typo
    assert len(r.stderr.splitlines()) <= 3, r.stderr


def test_sim_bad_seed_is_refused():
    r = run(prog("stopcock-sim"), "--seed", "0x10", "--scenario", "a",
            "--modbus-tcp", "127.0.0.1:1", "--pump-link", "p")
    assert r.returncode == 2
    assert "--seed" in r.stderr


def test_sim_help_and_man_page_list_the_same_options():
    r = run(prog("stopcock-sim"), "--help")
    assert r.returncode == 0, r.stderr
    helped = long_options(r.stdout)
    with open(os.path.join(ROOT, "docs", "stopcock-sim.1")) as f:
        manned = long_options(f.read())
    assert "version" in helped and "help" in helped
    assert helped == manned, (
        f"only in --help: {sorted(helped - manned)}; only in the man page: {sorted(manned - helped)}")


def man_text(name):
    with open(os.path.join(ROOT, "docs", name)) as f:
        return f.read()


def test_check_and_ports_options_are_in_the_man_page():
    manned = long_options(man_text("stopcock.1"))
    for cmd, want in (("check", {"config", "station"}), ("ports", {"test", "station"}),
                      ("predict", {"calibration", "amount", "seed", "scenario", "json"})):
        r = run(prog("stopcock"), cmd, "--help")
        assert r.returncode == 0, r.stderr
        helped = long_options(r.stdout) - {"help"}
        assert want <= helped | manned
        missing = (helped | want) - manned
        assert not missing, f"stopcock {cmd}: {sorted(missing)} missing from stopcock.1"


def test_help_command_and_a_misspelt_command():
    stopcock = os.path.join(os.environ["STOPCOCK_BUILD"], "bin", "stopcock")
    r = subprocess.run([stopcock, "help"], capture_output=True, text=True)
    assert r.returncode == 0 and "stopcock start" in r.stdout and "stopcock help" in r.stdout
    r = subprocess.run([stopcock, "help", "start"], capture_output=True, text=True)
    assert r.returncode == 0 and "--sample-id" in r.stdout + r.stderr, (r.stdout, r.stderr)
    r = subprocess.run([stopcock, "strat"], capture_output=True, text=True)
    assert r.returncode == 2
    assert "unknown command 'strat'; did you mean 'start'?" in r.stderr, r.stderr


@pytest.mark.parametrize("cmd,opts", [
    ("start", ["station", "method", "sample-id", "amount"]), ("wait", ["timeout"]),
    ("show", ["csv", "svg"]), ("halt", ["station"]), ("resume", ["station"]),
    ("calibrate", ["station", "buffers"]), ("events", ["after", "limit"]),
    ("predict", ["scenario", "amount", "seed", "calibration", "json"])])
def test_every_option_has_its_meaning_in_help_and_the_man_page(cmd, opts):
    # Before: `stopcock start --help` printed the usage line alone.
    stopcock = os.path.join(os.environ["STOPCOCK_BUILD"], "bin", "stopcock")
    r = subprocess.run([stopcock, cmd, "--help"], capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    man = open(os.path.join(ROOT, "docs", "stopcock.1")).read()
    for o in opts:
        line = next((l for l in r.stdout.splitlines() if l.strip().startswith(f"--{o} ")), None)
        assert line and len(line.split(None, 1)[1]) > 5, (cmd, o, r.stdout)
        assert "\\-\\-" + o.replace("-", "\\-") in man, (cmd, o, "not in docs/stopcock.1")
    if cmd == "start":
        assert "sample unit (mL or g)" in r.stdout


def test_stopcockd_help_lists_every_option_with_its_meaning_and_the_man_page_too():
    # Before: `stopcockd --help` gave the two usage lines alone.
    d = os.path.join(os.environ["STOPCOCK_BUILD"], "bin", "stopcockd")
    r = subprocess.run([d, "--help"], capture_output=True, text=True)
    assert r.returncode == 0
    opts = re.findall(r"^\s+(?:-\w, )?--([a-z-]+)(?: [A-Z:]+)?\s{2,}\S", r.stdout, re.M)
    assert set(opts) >= {"config", "listen", "state-dir", "check-config", "verbose",
                         "version", "help"}, r.stdout
    man = open(os.path.join(ROOT, "docs", "stopcockd.8")).read()
    for o in opts:
        assert "\\-\\-" + o.replace("-", "\\-") in man, o
    r = subprocess.run([d, "--bogus"], capture_output=True, text=True)
    assert r.returncode == 2 and "unknown option '--bogus'" in r.stderr
