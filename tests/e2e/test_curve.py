"""`stopcock curve`: output format, and bad input refused with file:line:col, exit 2."""

import os
import re
import subprocess

BIN = os.path.join(os.environ.get("STOPCOCK_BUILD", "build"), "bin", "stopcock")
GOOD = "tests/data/scenarios/acetic-skoog.yaml"


def curve(*args):
    return subprocess.run([BIN, "curve", *args], capture_output=True, text=True, timeout=30)


def test_prints_ml_ph_mv_lines():
    p = curve(GOOD, "--ml", "0,25,50")
    assert p.returncode == 0, p.stderr
    header, *lines = p.stdout.splitlines()
    assert len(lines) == 3
    for line in lines:
        assert re.fullmatch(r"\d+\.\d{3} -?\d+\.\d{4} -?\d+\.\d{2}", line), line
    ml, ph, _ = lines[1].split()
    # Skoog et al., Fundamentals of Analytical Chemistry, weak acid/strong base
    # table: pH 4.76 at half the equivalence volume [M] (docs/chemistry.md §5a)
    assert ml == "25.000" and abs(float(ph) - 4.76) <= 0.01


def test_bad_scenario_exits_2_with_location():
    p = curve("tests/data/scenarios/bad/pka-not-ascending.yaml", "--ml", "0,1")
    assert p.returncode == 2
    assert re.match(r"tests/data/scenarios/bad/pka-not-ascending\.yaml:\d+:\d+: ", p.stderr), p.stderr
    assert "ascending" in p.stderr
    assert p.stdout == ""


def test_unknown_key_exits_2():
    p = curve("tests/data/scenarios/bad/unknown-key.yaml", "--ml", "1")
    assert p.returncode == 2
    assert "did you mean 'temperature_c'?" in p.stderr


def test_bad_ml_list_exits_2_with_column():
    p = curve(GOOD, "--ml", "0,1,abc")
    assert p.returncode == 2
    assert p.stderr.startswith("--ml:1:5: "), p.stderr
    p = curve(GOOD, "--ml", "0,-2")
    assert p.returncode == 2
    assert p.stderr.startswith("--ml:1:3: "), p.stderr


def test_missing_file_exits_2():
    p = curve("tests/data/scenarios/no-such-file.yaml", "--ml", "1")
    assert p.returncode == 2
    assert "no-such-file.yaml:0:0: cannot open" in p.stderr


def test_curve_prints_a_header_naming_each_column_and_unit():
    p = curve(GOOD, "--ml", "0")
    assert p.returncode == 0, p.stderr
    header = p.stdout.splitlines()[0]
    assert header.startswith("#"), "the header must read as a comment to plotting tools"
    assert header.split()[1:] == ["titrant_mL", "pH", "electrode_mV"], header
