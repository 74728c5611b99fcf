"""Control characters never reach records or terminals (docs/api.md, "Text
fields"): a sample_id with an escape sequence and a newline, a method title
with an escape, are refused with a clear error; and the CLI escapes whatever a
daemon sends anyway. Before, `stopcock show` printed the raw sequence plus a
forged line."""
import http.server
import json
import subprocess
import threading

import pytest

import daemon_bench as db

EVIL = "BATCH-7\x1b[2J\nrun 1  finished"


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    b = db.Bench(tmp_path_factory.mktemp("ctl"))
    b.put_method()
    yield b
    b.close()


def test_sample_id_with_control_characters_is_refused(bench):
    before = bench.get("/v1/runs?limit=1000")["runs"]
    for sid in (EVIL, "A\x07B", "A\x7fB", "A\u009bB"):
        r = bench.write("POST", "/v1/runs", json.dumps(
            {"station": "sim1", "method": "wash-acid-mv", "sample_id": sid, "amount": 10.0}))
        assert r.status == 400, (sid, r.status, r.body)
        assert "control character" in r.json()["error"]["message"]
    assert len(bench.get("/v1/runs?limit=1000")["runs"]) == len(before)


def test_method_title_with_an_escape_is_refused_at_its_line(bench, tmp_path):
    text = db.METHOD_MV.read_text().replace(
        "title: Acid in biodiesel wash water, as HCl (mV signal)",
        'title: "Acid in wash water \\e[31m red"')
    assert "\\e[31m" in text
    r = bench.write("PUT", "/v1/methods/wash-acid-mv", text.replace("revision: 1", "revision: 9"))
    assert r.status == 422, (r.status, r.body)
    msg = r.json()["error"]["message"]
    line = next(i for i, ln in enumerate(text.splitlines(), 1) if ln.startswith("title:"))
    assert f":{line}:8: title holds a control character (U+001B)" in msg, msg
    f = tmp_path / "wash-acid-mv.yaml"
    f.write_text(text)
    c = subprocess.run([db.binary("stopcock"), "check", str(f)], capture_output=True, text=True)
    assert c.returncode == 2 and f"{f}:{line}:8: title holds a control character (U+001B)" in c.stderr, \
        c.stderr


class Evil(http.server.BaseHTTPRequestHandler):
    """A daemon that lets a control character through: the CLI must not."""

    def do_GET(self):
        rec = {"id": 1, "seq": 1, "station": "sim1", "state": "finished", "phase": None,
               "method": {"id": "m", "revision": 1, "sha256": "0" * 64},
               "sample": {"id": EVIL, "amount": 10.0, "unit": "mL"},
               "queued_at": None, "started_at": None, "ended_at": None,
               "titrant": None, "calibration": None, "endpoints": [], "results": [],
               "additions": 0, "dispensed_ml": 0.0, "stop_reason": "endpoints_found",
               "stop_detail": "x\x1b]0;owned\x07", "faults": []}
        body = json.dumps(rec).encode()
        self.send_response(200)
        self.send_header("Content-Type", "application/json")
        self.send_header("Content-Length", str(len(body)))
        self.end_headers()
        self.wfile.write(body)

    def log_message(self, *a):
        pass


def test_cli_escapes_what_a_daemon_sends():
    srv = http.server.HTTPServer(("127.0.0.1", 0), Evil)
    threading.Thread(target=srv.serve_forever, daemon=True).start()
    try:
        r = subprocess.run([db.binary("stopcock"), "show", "1", "--url",
                            f"http://127.0.0.1:{srv.server_port}"],
                           capture_output=True, text=True, timeout=20)
    finally:
        srv.shutdown()
    assert r.returncode == 0, r.stderr
    assert "\x1b" not in r.stdout and "\x07" not in r.stdout
    assert "BATCH-7\\x1B[2J\\x0Arun 1  finished" in r.stdout, r.stdout
    assert not any(l.startswith("run 1  finished") for l in r.stdout.splitlines()[1:]), r.stdout
