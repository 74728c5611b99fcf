"""What every end-to-end test needs: where the repository and the build are,
the programs, and a free loopback port. Imported by name (tests/conftest.py
puts tests/e2e on the import path)."""
import os
import pathlib
import socket
import subprocess

ROOT = pathlib.Path(__file__).resolve().parents[2]


def build_dir():
    b = os.environ.get("STOPCOCK_BUILD")
    assert b, "STOPCOCK_BUILD must name the build directory (make check sets it)"
    return pathlib.Path(b)


def binary(name):
    """Absolute path of a built program (stopcockd, stopcock, stopcock-sim)."""
    p = build_dir() / "bin" / name
    assert p.exists(), f"{p} is missing: build with make all"
    return str(p)


def free_port():
    """A TCP port on 127.0.0.1 that was free a moment ago."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def run(cmd, **kw):
    """subprocess.run with text output captured and a 120 s timeout."""
    kw.setdefault("capture_output", True)
    kw.setdefault("text", True)
    kw.setdefault("timeout", 120)
    return subprocess.run(cmd, **kw)


def make_install(dest):
    """`make install DESTDIR=dest PREFIX=/usr` of the build under test."""
    r = run(["make", "--no-print-directory", f"BUILD={build_dir()}", "install",
             f"DESTDIR={dest}", "PREFIX=/usr"], cwd=ROOT, timeout=600)
    assert r.returncode == 0, f"make install failed:\n{r.stdout}\n{r.stderr}"
    return dest
