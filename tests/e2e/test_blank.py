"""A blank run's volume reaches later runs that use the same titrant, as
blank_ml (issue: blanks are stored per titrant, docs/calibration.md). Real
daemon, real simulator; the fast mV methods of tests/data/daemon/."""
import pathlib

import pytest

import reliability_bench as rb

HERE = pathlib.Path(__file__).resolve().parents[1]  # tests/


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    b = rb.Bench(tmp_path_factory.mktemp("blank"))
    try:
        for name in ("fast-blank-mv", "fast-acid-net-mv"):
            b.put_method(HERE / "data" / "daemon" / f"{name}.yaml")
        yield b
    finally:
        b.close()


def test_blank_volume_is_subtracted_by_a_method_with_the_same_titrant(bench):
    blank_id = bench.start_run(method="fast-blank-mv", sample="BLANK-1", amount=10.0)
    blank = bench.wait_state(blank_id, ("finished", "failed", "aborted"), timeout_s=90)
    assert blank["state"] == "finished", blank
    blank_ml = blank["endpoints"][0]["volume_ml"]
    assert blank_ml > 0

    bench.wait_idle()
    bench.fresh_beaker()
    rid = bench.start_run(method="fast-acid-net-mv", sample="WASH-12", amount=10.0)
    rec = bench.wait_state(rid, ("finished", "failed", "aborted"), timeout_s=90)
    assert rec["state"] == "finished", rec
    end_ml = rec["endpoints"][0]["volume_ml"]
    res = next(r for r in rec["results"] if r["name"] == "acid")
    # The method's own formula, computed here from the two records: 4 decimals.
    want = round((end_ml - blank_ml) * 0.1000 * 1.0 * 1000 / 10.0, 4)
    assert res["value"] == pytest.approx(want, abs=0.00011), (res, end_ml, blank_ml)
