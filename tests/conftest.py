"""Shared by every pytest file under tests/ (see tests/README.md).

The helper modules live beside the tests that use them: tests/e2e/ holds the
simulated bench (daemon_bench.py, benchlib.py, chem_reference.py) and
tests/reliability/ the fast bench of the reliability suites. Both folders are
put on the import path here, once, so a test in either folder imports them by
name."""
import pathlib
import sys

TESTS = pathlib.Path(__file__).resolve().parent
for sub in ("e2e", "reliability"):
    p = str(TESTS / sub)
    if p not in sys.path:
        sys.path.insert(0, p)
