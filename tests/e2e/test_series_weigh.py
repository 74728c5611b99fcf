"""Amounts from a balance (docs/api.md, "Series"): a series row with
`"amount": "weigh"` through a real stopcockd on the simulated bench, whose
balance (stopcock-sim --balance-weight) weighs 12.5 g. One daemon for the
module:

  - the run's amount is the simulated weight and the result is computed
    from it (16 rather than the 20 an amount of 10 would give);
  - a mute balance: the series waits with a prompt naming the fault and
    queues nothing; the operator types the weight with a reason, and the
    run uses that weight;
  - a station without a balance refuses "weigh" with a clear 400.
"""
import json
import subprocess
import time

import pytest
import yaml

import benchlib
import daemon_bench as db
from common import ROOT, binary

WEIGHT_G = 12.5
METHOD_TEXT = (db.DATA / "fast-acid-rep-mv.yaml").read_text()
FAST_PUMP = ROOT / "tests" / "data" / "reliability" / "sim-fast.yaml"


class FastBench(db.Bench):
    def start_daemon(self, *args, **kw):
        cfg = yaml.safe_load(self.config.read_text())
        cfg["stations"][0]["burette"]["profile"] = str(FAST_PUMP)
        self.config.write_text(yaml.safe_dump(cfg, sort_keys=False))
        return super().start_daemon(*args, **kw)


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("weigh")
    b = FastBench(tmp, sim_args=("--balance-weight", str(WEIGHT_G)))
    # The same method, one beaker a sample, on a sample weighed in grams.
    text = (METHOD_TEXT.replace("method: fast-acid-rep-mv", "method: fast-acid-weighed")
            .replace("sample: {unit: mL, min: 1.0, max: 50.0}",
                     "sample: {unit: g, min: 1.0, max: 50.0}")
            .replace("replicates: {count: 2, max_rsd_pct: 2.0}\n", "")
            .replace("    accept: {min: 18.0, max: 21.0}\n", ""))
    assert "unit: g" in text and "replicates" not in text and "accept" not in text
    path = tmp / "fast-acid-weighed.yaml"
    path.write_text(text)
    b.put_method(path)
    yield b
    b.close()


def post(bench, sample_id):
    # A fresh beaker of the default scenario (0.0200 mol/L in 10 mL).
    assert bench.control(f"load {db.SCENARIO}") == "ok"
    body = {"station": "sim1", "samples": [
        {"sample_id": sample_id, "method": "fast-acid-weighed", "amount": "weigh"}]}
    r = bench.write("POST", "/v1/series", json.dumps(body))
    assert r.status == 201, r.body
    return r.json()["id"]


def wait_final(bench, sid, timeout_s=60):
    deadline = time.monotonic() + timeout_s
    while (s := bench.get(f"/v1/series/{sid}"))["state"] in ("queued", "running"):
        assert time.monotonic() < deadline, s
        time.sleep(0.1)
    return s


def acid(rec):
    return next(x["value"] for x in rec["results"] if x["name"] == "acid")


def test_weighed_amount_is_the_runs_amount_and_the_result_uses_it(bench):
    sid = post(bench, "W-1")
    s = wait_final(bench, sid)
    assert s["state"] == "finished", s
    p = s["samples"][0]
    assert p["amount"] == "weigh"
    assert p["weights"] == [{"value": WEIGHT_G, "unit": "g", "source": "balance"}]
    rec = bench.run(p["runs"][0])
    assert rec["state"] == "finished", rec
    assert rec["sample"]["amount"] == pytest.approx(WEIGHT_G)
    assert rec["weighing"] == {"value": WEIGHT_G, "unit": "g", "source": "balance"}
    # 0.0200 mol/L in 10 mL ends near 2 mL: 2 x 0.1 x 1000 / 12.5 = 16.
    assert acid(rec) == pytest.approx(16.0, rel=0.015)


def test_mute_balance_waits_with_the_fault_and_takes_a_typed_weight(bench):
    assert bench.control("fault mute-balance") == "ok"
    sid = post(bench, "W-2")
    deadline = time.monotonic() + 20
    while not (s := bench.get(f"/v1/series/{sid}"))["waiting"]:
        assert time.monotonic() < deadline, s
        time.sleep(0.1)
    assert "no reply to 'WEIGH'" in s["prompt"], s
    assert f"/v1/series/{sid}/weight" in s["prompt"], s
    assert s["samples"][0]["runs"] == [] and s["current_run"] is None
    # A typed weight needs its reason.
    r = bench.write("POST", f"/v1/series/{sid}/weight",
                    json.dumps({"value": 8.0, "unit": "g"}))
    assert r.status == 400 and b"reason" in r.body, r.body
    r = bench.write("POST", f"/v1/series/{sid}/weight", json.dumps(
        {"value": 8000, "unit": "mg", "reason": "balance line down; weighed on the spare"}))
    assert r.status == 202, r.body
    s = wait_final(bench, sid)
    assert bench.control("clear") == "ok"
    assert s["state"] == "finished", s
    assert s["samples"][0]["weights"] == [
        {"value": 8000, "unit": "mg",
         "source": "typed: balance line down; weighed on the spare"}]
    rec = bench.run(s["samples"][0]["runs"][0])
    assert rec["sample"]["amount"] == pytest.approx(8.0)
    assert rec["weighing"] == {"value": 8000, "unit": "mg",
                               "source": "typed: balance line down; weighed on the spare"}
    assert acid(rec) == pytest.approx(25.0, rel=0.015)
    # Nothing waits for a weight any more.
    r = bench.write("POST", f"/v1/series/{sid}/weight",
                    json.dumps({"value": 1, "unit": "g", "reason": "x"}))
    assert r.status in (404, 409), r.body


def test_ports_test_weighs_on_the_configured_balance(bench):
    dev = benchlib.Devices(str(bench.config))
    try:
        opened = dev.open(4)  # burette, probe, stirrer, balance
        assert opened[-1]["cmd"] == "open balance" and opened[-1]["status"] == "ok", opened
        r = dev.do("balance-weigh")
        assert r["status"] == "ok" and r["value"] == WEIGHT_G and r["unit"] == "g", r
        assert bench.control("fault balance-garbage") == "ok"
        r = dev.do("balance-weigh")
        assert r["status"] == "bad_reply" and "unreadable" in r["error"], r
    finally:
        assert bench.control("clear") == "ok"
        dev.close()


def test_series_show_names_weigh_as_the_amount(bench):
    done = [s for s in bench.get("/v1/series?limit=10")["series"] if s["state"] == "finished"]
    assert done, "the tests above finish a weighed series first"
    p = subprocess.run([binary("stopcock"), "series", "show", str(done[0]["id"]), "--url",
                        bench.url, "--token-file", str(bench.tmp / "token")],
                       capture_output=True, text=True, timeout=30)
    assert p.returncode == 0 and "(fast-acid-weighed, weigh): runs" in p.stdout, p
