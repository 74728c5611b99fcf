"""End-to-end tests of `stopcock check`: exit codes, output format, every
error of a file reported, and the -c cross-check against a daemon config."""
import glob
import os
import re
import subprocess

import pytest

import common

BUILD = os.environ.get("STOPCOCK_BUILD")
STOPCOCK = os.path.join(BUILD, "bin", "stopcock") if BUILD else None
DIAG = re.compile(r"^(?P<file>[^:]+):(?P<line>\d+):(?P<col>\d+): (?P<msg>.+)$")


def run(*args):
    assert STOPCOCK, "STOPCOCK_BUILD must name the build directory"
    return subprocess.run([STOPCOCK, "check", *args], capture_output=True, text=True,
                          timeout=30)


def test_examples_are_valid():
    files = sorted(glob.glob("config/methods/*.yaml"))
    assert len(files) >= 5
    r = run(*files)
    assert r.returncode == 0, r.stderr
    assert r.stderr == ""
    lines = r.stdout.splitlines()
    assert len(lines) == len(files)
    for f, line in zip(files, lines):
        m = re.match(r"^(.+): ok \(method ([a-z0-9-]+), revision (\d+), sha256 ([0-9a-f]{64})\)$",
                     line)
        assert m, line
        assert m.group(1) == f
        assert m.group(2) == os.path.basename(f)[:-5]


def test_sha256_is_of_the_exact_bytes():
    import hashlib
    f = "config/methods/cider-acidity.yaml"
    with open(f, "rb") as fh:
        want = hashlib.sha256(fh.read()).hexdigest()
    r = run(f)
    assert r.returncode == 0
    assert r.stdout.strip().endswith("sha256 %s)" % want)


def expected(path):
    with open(path[:-5] + ".expect") as fh:
        return [line for line in fh.read().splitlines() if not line.startswith("#")]


@pytest.mark.parametrize("name", ["many-errors", "formula-folded", "duplicate-key",
                                  "bad-utf8", "unknown-key-typo", "formula-unclosed",
                                  "syntax-colon-no-space", "syntax-tab-indent",
                                  "syntax-indent-mismatch", "syntax-unclosed-bracket",
                                  "syntax-unclosed-brace", "syntax-unclosed-quote",
                                  "yaml-syntax-error"])
def test_bad_file_exit_2_with_exact_errors(name):
    path = "tests/data/methods/bad/%s.yaml" % name
    r = run(path)
    assert r.returncode == 2
    assert r.stdout == ""
    got = r.stderr.splitlines()
    for line in got:
        m = DIAG.match(line)
        assert m, line
        assert m.group("file") == path
    assert [line[len(path) + 1:] for line in got] == expected(path)


def test_every_error_of_a_file_is_reported():
    r = run("tests/data/methods/bad/many-errors.yaml")
    assert r.returncode == 2
    # one per mistake in the file, in file order
    assert len(r.stderr.splitlines()) == 12
    positions = [tuple(map(int, DIAG.match(l).group("line", "col")))
                 for l in r.stderr.splitlines()]
    assert positions == sorted(positions)


def test_mixed_good_and_bad():
    good, bad = "config/methods/water-blank.yaml", "tests/data/methods/bad/window-reversed.yaml"
    r = run(good, bad)
    assert r.returncode == 2
    assert r.stdout.startswith(good + ": ok ")
    assert r.stderr.startswith(bad + ":9:37: detect.window low (9 pH) must be below")


def test_missing_file_and_usage():
    r = run("no/such/method.yaml")
    assert r.returncode == 2
    assert DIAG.match(r.stderr.splitlines()[0])
    assert "cannot open" in r.stderr
    r = run()
    assert r.returncode == 2
    assert "usage:" in r.stderr
    r = run("--bogus", "config/methods/water-blank.yaml")
    assert r.returncode == 2


def station(name, vessel_ml, capacity_ml):
    return ("  - name: %s\n    vessel_max_ml: %g\n"
            "    burette: {driver: pump-serial, port: /dev/null, profile: %s,"
            " capacity_ml: %g}\n"
            "    probe: {driver: probe-modbus, transport: tcp, host: 127.0.0.1, port: 1502,"
            " unit: 1, registers: {mv: {table: input, address: 0, type: float32}}}\n"
            % (name, vessel_ml, os.path.abspath("config/pumps/sim.yaml"), capacity_ml))


def write_config(tmp_path, stations):
    cfg = tmp_path / "stopcockd.yaml"
    cfg.write_text("http: {listen: 127.0.0.1:8470}\n"
                   "storage: {database: %s}\n"
                   "stations:\n" % (tmp_path / "db.sqlite") + "".join(stations))
    return str(cfg)


def test_cross_check_against_daemon_config(tmp_path):
    cfg = write_config(tmp_path, [station("big", 250, 10), station("small", 30, 10)])
    f = "config/methods/cider-acidity.yaml"
    r = run("-c", cfg, "--station", "big", f)
    assert r.returncode == 0, r.stderr
    # without --station the smallest vessel counts, so a pass fits every station
    r = run("-c", cfg, f)
    assert r.returncode == 2
    lines = r.stderr.splitlines()
    m = DIAG.match(lines[0])
    assert m and m.group("file") == f
    # cider-acidity.yaml line 9 is `sample: {unit: mL, min: 1.0, max: 50.0}`
    assert lines == [f + ":9:35: sample.max (50 mL) plus stop.volume_max_ml (25 mL) is above "
                     "the station's vessel_max_ml (30 mL)"]
    r = run("-c", cfg, "--station", "nowhere", f)
    assert r.returncode == 2
    assert "no station 'nowhere'" in r.stderr


def test_cross_check_against_the_burette(tmp_path):
    # A 1 mL syringe: with the daemon's 20 refills it delivers at most 21 mL,
    # below the cider method's 25 mL limit; 0.5 mL doses still fit one stroke.
    cfg = write_config(tmp_path, [station("micro", 250, 1.0)])
    f = "config/methods/cider-acidity.yaml"
    r = run("-c", cfg, f)
    assert r.returncode == 2
    assert r.stderr.splitlines() == [
        f + ":23:46: stop.volume_max_ml (25 mL) is more than the burette can deliver: "
        "1 mL capacity x (1 + 20 refills) = 21 mL"]
    r = run("-c", cfg, "config/methods/water-blank.yaml")
    assert r.returncode == 0, r.stderr


def doser(name):
    return ("      %s:\n        reagent: HCl 0.1 mol/L\n        molarity: 0.1\n"
            "        burette: {driver: pump-serial, port: /dev/null, profile: %s,"
            " capacity_ml: 20}\n" % (name, os.path.abspath("config/pumps/sim.yaml")))


def test_cross_check_add_steps_against_the_station_dosers(tmp_path):
    f = "config/methods/whey-ammonium.yaml"
    with_acid = station("a", 150, 10) + "    dosers:\n" + doser("acid") + doser("base")
    without = station("b", 150, 10) + "    dosers:\n" + doser("base")
    cfg = write_config(tmp_path, [with_acid, without])
    r = run("-c", cfg, "--station", "a", f)
    assert r.returncode == 0, r.stderr
    # whey-ammonium.yaml line 15 is `  - {add: {doser: acid, ml: 10.0}}`
    want = [f + ":15:19: before[1].add.doser 'acid' is not a dosing unit of the station "
            "(it has: base)"]
    r = run("-c", cfg, "--station", "b", f)
    assert r.returncode == 2
    assert r.stderr.splitlines() == want
    # without --station the method must fit every station: b lacks acid
    r = run("-c", cfg, f)
    assert r.returncode == 2
    assert r.stderr.splitlines() == want
    # a station without a dosers key has none
    cfg = write_config(tmp_path, [station("c", 150, 10)])
    r = run("-c", cfg, f)
    assert r.returncode == 2
    assert "'acid' is not a dosing unit of the station (it has none)" in r.stderr
    # a doser whose driver config is bad is the driver's error, as for the burette
    bad = station("d", 150, 10) + "    dosers:\n" + doser("acid").replace("capacity_ml: 20",
                                                                          "capacity_ml: -1")
    r = run("-c", write_config(tmp_path, [bad]), f)
    assert r.returncode == 2
    assert "capacity_ml" in r.stderr


def test_cross_check_beaker_total_with_additions(tmp_path):
    # sample.max 60 mL + the 10 mL addition + stop.volume_max_ml 20 mL = 90 mL:
    # fits 90 mL, not 85 mL, although sample and titrant alone (80 mL) would
    f = "config/methods/whey-ammonium.yaml"
    acid = "    dosers:\n" + doser("acid")
    r = run("-c", write_config(tmp_path, [station("fits", 90, 10) + acid]), f)
    assert r.returncode == 0, r.stderr
    r = run("-c", write_config(tmp_path, [station("over", 85, 10) + acid]), f)
    assert r.returncode == 2
    assert r.stderr.splitlines() == [
        f + ":15:5: the beaker could reach 90 mL, above the station's vessel_max_ml (85 mL): "
        "sample.max 60 mL + additions 10 mL + stop.volume_max_ml 20 mL"]


def test_safety_and_methods_docs_state_the_rule_the_code_applies(tmp_path):
    # SAFETY.md said a volume_max_ml above the burette's capacity is refused,
    # while the code allows capacity x (1 + 20 refills): one rule in all three.
    cfg = write_config(tmp_path, [station("micro", 250, 1.0)])
    r = run("-c", cfg, "config/methods/cider-acidity.yaml")
    m = re.search(r"capacity x \(1 \+ (\d+) refills\)", r.stderr)
    assert m, r.stderr
    refills = m.group(1)
    root = str(common.ROOT)
    safety = open(os.path.join(root, "SAFETY.md")).read()
    methods = open(os.path.join(root, "docs", "methods.md")).read()
    assert f"capacity × (1 + {refills} refills)" in safety, "SAFETY.md must state the refill rule"
    assert "burette's capacity × (1 + allowed refills)" in methods
    assert f"the daemon allows a run {refills}\nrefills" in methods


@pytest.mark.parametrize("old,new,words", [
    # mV signal with pH-sized numbers (cider-acidity reads pH; made to read mV)
    ("signal: ph", "signal: mv", "detect.window [5.5, 11.5] looks like pH values"),
    ("signal: ph", "signal: mv", "dosing.step_aim 0.4 looks like a pH step"),
    # a settling band below a typical electrode's noise (about 0.0034 pH)
    ("still_within: 0.02", "still_within: 0.001", "below the noise of a typical electrode"),
    # a dose no common burette syringe holds, checked without a station
    ("dose_max_ml: 1.00", "dose_max_ml: 60.0", "more than the largest common burette"),
    # step_aim made irrelevant by the dose range
    ("dose_max_ml: 1.00", "dose_max_ml: 0.015", "step_aim has almost no effect"),
])
def test_plausible_mistakes_are_warned_about(tmp_path, old, new, words):
    text = open("config/methods/cider-acidity.yaml").read()
    assert old in text
    if "60.0" in new:
        text = text.replace("volume_max_ml: 25.0", "volume_max_ml: 100.0")
    f = tmp_path / "cider-acidity.yaml"
    f.write_text(text.replace(old, new))
    r = run(str(f))
    assert r.returncode == 0, r.stderr    # warnings do not fail a check
    assert any(l.startswith(f"{f}: warning: ") and words in l for l in r.stderr.splitlines()), \
        r.stderr
    # and the method as shipped gets none
    r = run("config/methods/cider-acidity.yaml")
    assert "warning" not in r.stderr
