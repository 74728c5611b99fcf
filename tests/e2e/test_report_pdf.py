"""The one-page PDF report of a run (docs/api.md, "GET
/v1/runs/{id}/report.pdf"), drawn by cairo and pango in a real stopcockd:
pdfinfo reads it as one A4 page, and pdftotext finds the lab, the sample
id, the result's value, its limits and the reviewer's name; `stopcock show
RUN --pdf FILE` writes the same."""
import json
import os
import signal
import subprocess
import time

import pytest

import daemon_bench as db

QA = "qa-review-token-0123456789"


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    b = db.Bench(tmp_path_factory.mktemp("pdf"))
    b.put_method()
    b.stop_daemon()
    text = b.config.read_text()
    b.config.write_text(text.replace(
        "records: {titer_required: false}",
        "records: {titer_required: false, lab_name: \"Meadowbank Co-op QC lab\"}"))
    with open(b.tmp / "token", "a") as f:
        f.write(f"qa:read,review:{QA}\n")
    b.start_daemon()
    yield b
    b.close()


@pytest.fixture(scope="module")
def reviewed(bench):
    bench.fresh_beaker()
    r = bench.write("POST", "/v1/titrants", json.dumps(
        {"name": "NaOH 0.1 mol/L", "titer": 1.0, "molarity": 0.1, "reason": "certificate 99",
         "valid_days": 30}))
    assert r.status == 201, r.body
    rid = bench.start_run(sample="PDF-SAMPLE-77")
    rec = bench.wait_state(rid, ("finished", "failed", "aborted"), timeout_s=90)
    assert rec["state"] == "finished", rec
    r = bench.request("POST", f"/v1/runs/{rid}/review",
                      json.dumps({"decision": "approve", "reason": "curve looked at"}),
                      token=QA, headers={"Content-Type": "application/json"})
    assert r.status == 200, r.body
    return bench.run(rid)


def pdf_text(path):
    info = subprocess.run(["pdfinfo", str(path)], capture_output=True, text=True, timeout=30)
    assert info.returncode == 0, info.stderr
    text = subprocess.run(["pdftotext", "-layout", str(path), "-"], capture_output=True,
                          text=True, timeout=30)
    assert text.returncode == 0, text.stderr
    return info.stdout, " ".join(text.stdout.split())  # words, whatever the layout


def test_the_report_holds_what_a_person_files(bench, reviewed, tmp_path):
    rid = reviewed["id"]
    r = bench.request("GET", f"/v1/runs/{rid}/report.pdf")
    assert r.status == 200 and r.headers["Content-Type"] == "application/pdf"
    assert r.body.startswith(b"%PDF-")
    path = tmp_path / "r.pdf"
    path.write_bytes(r.body)
    info, text = pdf_text(path)
    fields = {k.strip(): v.strip() for k, v in
              (l.split(":", 1) for l in info.splitlines() if ":" in l)}
    assert fields["Pages"] == "1" and fields["Page size"].startswith("595 x 842 pts"), info
    assert "Meadowbank Co-op QC lab" in text
    assert "PDF-SAMPLE-77" in text
    assert reviewed["method"]["sha256"] in text
    acid = reviewed["results"][0]
    assert f"acid = {acid['value']:.4f} mmol/L" in text, text
    assert "limits 10 to 30" in text and f"verdict {acid['accept']}" in text
    assert "approved by qa" in text and "curve looked at" in text
    # the titer used, where it came from and until when it was valid
    t = reviewed["titrant"]
    assert "Titer entered by sim: certificate 99" in text, text
    assert f"valid until {t['titer_valid_until']}" in text, text
    ep = reviewed["endpoints"][0]
    assert f"EP1 {ep['volume_ml']:.4f} mL ± {ep['u_volume_ml']:.4f} mL" in text, text


def test_stopcock_show_writes_the_report(bench, reviewed, tmp_path):
    out = tmp_path / "show.pdf"
    env = dict(os.environ, STOPCOCK_URL=bench.url)
    r = subprocess.run([db.binary("stopcock"), "show", str(reviewed["id"]), "--pdf", str(out)],
                       env=env, capture_output=True, text=True, timeout=30)
    assert r.returncode == 0, r.stderr
    _, text = pdf_text(out)
    assert "PDF-SAMPLE-77" in text


def test_an_unknown_run_has_no_report(bench):
    assert bench.request("GET", "/v1/runs/9999/report.pdf").status == 404
