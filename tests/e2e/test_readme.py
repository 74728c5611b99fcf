"""README's "The simulated bench, by hand", followed as written (issue 20).

The fenced block after that heading is parsed and its commands run in order,
in a fresh temporary folder, by bash. Substituted, and nothing else:
  - `/tmp/bench` -> a pytest temporary folder (so parallel runs do not meet);
  - the ports 1502 (Modbus) and 8470 (HTTP) -> free loopback ports;
  - `build/bin/` -> $STOPCOCK_BUILD/bin/ and `config/` -> the repository's
    config/ (the commands run in the temporary folder, so curve.svg and
    points.csv land there, not in the repository);
  - `make all` is left out: the build under test is already made.
What a person does between the lines, the test does too: it waits for
stopcock-sim's "ready" and for the daemon to answer before the next line, and
at each of calibrate's "Put the electrode in buffer X" prompts it runs the
README's `load ...ph-buffer-X.yaml` line (the "second terminal"), then
presses Enter.
The run must end finished with the endpoint and the acidity the cider
scenario's stoichiometry gives (its malic acid and potassium content).
"""

import os
import re
import signal
import socket
import subprocess
import time
import urllib.request
from pathlib import Path
from common import free_port  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
README = ROOT / "README.md"
CIDER = ROOT / "config" / "scenarios" / "cider-acidity.yaml"


def build_bin():
    b = os.environ.get("STOPCOCK_BUILD")
    assert b, "STOPCOCK_BUILD must name the build directory (make pytest sets it)"
    return Path(b) / "bin"


def by_hand_commands():
    """The commands of the fenced block after "The simulated bench, by hand":
    continuation lines joined, comments and blank lines dropped."""
    text = README.read_text()
    at = text.index("The simulated bench, by hand")
    m = re.search(r"```sh\n(.*?)```", text[at:], re.S)
    assert m, "README: no ```sh block after 'The simulated bench, by hand'"
    cmds, cur = [], ""
    for line in m.group(1).splitlines():
        cur += line
        if cur.rstrip().endswith("\\"):
            cur = cur.rstrip()[:-1] + " "
            continue
        # Drop a trailing comment (none of the commands has a '#' inside quotes).
        cmd = re.sub(r"\s+#.*$", "", cur).strip()
        cur = ""
        if cmd and not cmd.startswith("#"):
            cmds.append(cmd)
    return cmds


def expected_cider():
    """(endpoint mL, acidity g/L) from the scenario file itself: the diprotic
    malic acid takes 2 mol NaOH per mol, less the potassium already present."""
    text = CIDER.read_text()
    malic = float(re.search(r"malic acid, molar: ([0-9.]+)", text).group(1))
    potassium = float(re.search(r"potassium, molar: ([0-9.]+)", text).group(1))
    naoh = float(re.search(r"sodium hydroxide, molar: ([0-9.]+)", text).group(1))
    sample_ml = float(re.search(r"(?m)^sample_ml: ([0-9.]+)", text).group(1))
    end_ml = sample_ml * (2 * malic - potassium) / naoh
    return end_ml, end_ml * naoh * 67.04 / 10  # malic acid g/L, 10 mL sample (README)


def test_readme_block_names_the_shipped_files():
    cmds = by_hand_commands()
    text = " ".join(cmds)
    for f in re.findall(r"config/\S+\.yaml", text):
        assert (ROOT / f).is_file(), f"README names {f}, which is not shipped"
    assert any("ph-buffer-4.01" in c for c in cmds)
    # The sample goes back after the buffers and before the run starts.
    loads = [i for i, c in enumerate(cmds) if " load " in c]
    start = next(i for i, c in enumerate(cmds) if " start " in c)
    assert "cider-acidity" in cmds[loads[-1]] and loads[-1] < start, cmds


def test_readme_by_hand_gives_a_finished_run(tmp_path):
    bindir = build_bin()
    bench = tmp_path / "bench"
    work = tmp_path / "work"
    work.mkdir()
    modbus, http = free_port(), free_port()

    def subst(c):
        c = c.replace("/tmp/bench", str(bench))
        c = c.replace("127.0.0.1:1502", f"127.0.0.1:{modbus}")
        c = c.replace("127.0.0.1:8470", f"127.0.0.1:{http}")
        c = re.sub(r"(?<![\w/])build/bin/", f"{bindir}/", c)
        c = re.sub(r"(?<![\w/])config/", f"{ROOT}/config/", c)
        return c

    cmds = [subst(c) for c in by_hand_commands() if c != "make all"]
    env = dict(os.environ)
    procs, log = [], []
    shell_vars = ""  # `run=$(...)` results carried to the next lines

    def sh(cmd, **kw):
        full = shell_vars + cmd
        r = subprocess.run(["bash", "-ec", full], cwd=work, env=env, capture_output=True,
                           text=True, timeout=kw.get("timeout", 120))
        log.append(f"$ {cmd}\n{r.stdout}{r.stderr}")
        assert r.returncode == 0, "\n".join(log)
        return r.stdout

    try:
        i = 0
        while i < len(cmds):
            c = cmds[i]
            if c.endswith("&"):
                out = open(tmp_path / f"bg{len(procs)}.log", "w+")
                p = subprocess.Popen(["bash", "-c", "exec " + c[:-1]], cwd=work, env=env,
                                     stdout=out, stderr=subprocess.STDOUT,
                                     start_new_session=True)
                procs.append((p, out))
                # What a person waits for before typing the next line.
                deadline = time.monotonic() + 20
                while time.monotonic() < deadline:
                    assert p.poll() is None, f"{c} exited:\n{(tmp_path / out.name).read_text()}"
                    if "stopcock-sim" in c and "ready" in Path(out.name).read_text():
                        break
                    if "stopcockd" in c:
                        try:
                            urllib.request.urlopen(f"http://127.0.0.1:{http}/v1/health",
                                                   timeout=1).read()
                            break
                        except OSError:
                            pass
                    time.sleep(0.1)
                else:
                    raise AssertionError(f"{c} not ready after 20 s")
            elif m := re.match(r"export (\w+)=(.*)$", c):
                env[m.group(1)] = m.group(2)
            elif m := re.match(r"(\w+)=\$\((.*)\)$", c):
                value = sh(m.group(2)).strip()
                shell_vars += f"{m.group(1)}={value}; "
            elif " calibrate " in c:
                # The next lines that load a buffer are the second terminal's.
                buffers = {}
                while i + 1 < len(cmds) and re.search(r"ph-buffer-([0-9.]+)\.yaml", cmds[i + 1]):
                    i += 1
                    buffers[re.search(r"ph-buffer-([0-9.]+)\.yaml", cmds[i]).group(1)] = cmds[i]
                assert buffers, "README: no buffer loads after calibrate"
                cal = subprocess.Popen(["bash", "-c", "exec " + c], cwd=work, env=env,
                                       stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                       stderr=subprocess.STDOUT, text=True)
                lines = []
                for line in cal.stdout:
                    lines.append(line)
                    pm = re.match(r"Put the electrode in buffer ([0-9.]+)", line)
                    if pm:
                        assert pm.group(1) in buffers, f"no README line loads {pm.group(1)}"
                        sh(buffers[pm.group(1)])
                        cal.stdin.write("\n")
                        cal.stdin.flush()
                rc = cal.wait(timeout=600)
                log.append(f"$ {c}\n{''.join(lines)}")
                assert rc == 0, "\n".join(log)
            else:
                sh(c, timeout=900)
            i += 1

        record = "\n".join(log)
        assert (work / "curve.svg").read_text().startswith("<"), record
        csv = (work / "points.csv").read_text().splitlines()
        assert len(csv) > 10, record
        end_ml, acidity = expected_cider()
        show = sh(f'{bindir}/stopcock show "$run"')
        assert re.search(r"\bfinished\b", show), show
        got_end = [float(x) for x in re.findall(r"([0-9]+\.[0-9]+) mL", show)]
        assert any(abs(v - end_ml) < 0.05 for v in got_end), \
            f"no endpoint near {end_ml:.2f} mL in:\n{show}"
        got = [float(x) for x in re.findall(r"([0-9]+\.[0-9]+) g/L", show)]
        assert any(abs(v - acidity) / acidity < 0.01 for v in got), \
            f"no acidity within 1 % of {acidity:.3f} g/L in:\n{show}"
    finally:
        # Newest first: the daemon halts its burette before the simulator goes.
        for p, out in reversed(procs):
            if p.poll() is None:
                os.killpg(p.pid, signal.SIGTERM)
                try:
                    p.wait(timeout=10)
                except subprocess.TimeoutExpired:
                    os.killpg(p.pid, signal.SIGKILL)
                    p.wait()
            out.close()


def test_sim_control_command(tmp_path):
    """`stopcock-sim control SOCKET COMMAND`: the reply on stdout and exit 0, an
    error on stderr and exit 1; a relative `load` path is the caller's."""
    sim = build_bin() / "stopcock-sim"
    ctl = tmp_path / "ctl"
    p = subprocess.Popen([str(sim), "--scenario", str(CIDER), "--modbus-tcp",
                          f"127.0.0.1:{free_port()}", "--pump-link", str(tmp_path / "pump"),
                          "--control", str(ctl)],
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        assert p.stdout.readline().strip() == "ready", p.stderr.read()

        def control(*args, cwd=tmp_path):
            return subprocess.run([str(sim), "control", str(ctl), *args], cwd=cwd,
                                  capture_output=True, text=True, timeout=20)

        r = control("state")
        assert r.returncode == 0 and r.stdout.startswith("{"), r
        ph_cider = float(re.search(r'"ph":([0-9.]+)', r.stdout).group(1))
        r = control("load", "config/scenarios/ph-buffer-7.00.yaml", cwd=ROOT)
        assert (r.returncode, r.stdout.strip()) == (0, "ok"), r
        r = control("state")
        ph = float(re.search(r'"ph":([0-9.]+)', r.stdout).group(1))
        assert abs(ph - 7.00) < 0.01 and abs(ph_cider - 7.00) > 1, (ph_cider, ph)
        r = control("stir")
        assert r.returncode == 1 and "unknown command 'stir'" in r.stderr, r
        r = control("load", "no-such.yaml")
        assert r.returncode == 2 and "no-such.yaml" in r.stderr, r
        r = subprocess.run([str(sim), "control", str(tmp_path / "nobody"), "state"],
                           capture_output=True, text=True, timeout=20)
        assert r.returncode == 1 and "cannot connect" in r.stderr, r
    finally:
        p.terminate()
        p.wait(timeout=10)
