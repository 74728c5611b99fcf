"""Recompute with scipy the reference values tests/unit/test_stats.c checks
daemon/core/stats.c against: Grubbs' critical values (rows marked
SCIPY_GRUBBS) and Student's t quantiles (rows marked SCIPY_T). The C test
compares the code with these numbers; this test keeps the numbers honest.
"""

import math
import pathlib
import re

from scipy import stats

SRC = pathlib.Path(__file__).resolve().parents[1] / "unit" / "test_stats.c"
NUM = r"([0-9.eE+-]+)"


def grubbs_critical(n, alpha):
    t = stats.t.isf(alpha / (2 * n), n - 2)
    return (n - 1) / math.sqrt(n) * math.sqrt(t * t / (n - 2 + t * t))


def rows(marker):
    pat = re.compile(r"\{" + r",\s*".join([NUM] * 3) + r"\},\s*/\* " + marker + r" \*/")
    return [tuple(float(v) for v in m.groups()) for m in pat.finditer(SRC.read_text())]


def test_grubbs_rows_match_scipy():
    got = rows("SCIPY_GRUBBS")
    assert len(got) >= 5
    for n, alpha, g in got:
        assert abs(grubbs_critical(int(n), alpha) - g) < 1e-6, (n, alpha, g)


def test_t_rows_match_scipy():
    got = rows("SCIPY_T")
    assert len(got) >= 4
    for p, dof, t in got:
        assert abs(stats.t.isf(p, dof) - t) < 1e-6 * t, (p, dof, t)
