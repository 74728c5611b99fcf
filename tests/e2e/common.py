"""What every end-to-end test needs: where the repository and the build are,
the programs, and a free loopback port. Imported by name (tests/conftest.py
puts tests/e2e on the import path)."""
import os
import pathlib
import socket

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
