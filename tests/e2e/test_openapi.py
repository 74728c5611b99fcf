"""docs/openapi.yaml against a running daemon.

Starts `stopcock-sim` (which writes a daemon config for its bench) and
`stopcockd` on it, then:
  - calls every operation of the spec and checks that the status is one the
    spec documents and that a JSON body matches the documented schema;
  - checks that every write refuses a request without a token (401);
  - checks that every route the daemon's source serves is in the spec.
"""

import contextlib
import json
import os
import re
import signal
import socket
import subprocess
import time
import urllib.error
import urllib.request
from pathlib import Path

import pytest
import yaml
from common import build_dir, free_port  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
SPEC = yaml.safe_load((ROOT / "docs" / "openapi.yaml").read_text())
METHODS = ("get", "put", "post", "delete", "patch")


# ------------------------------------------------ a small JSON Schema check
# Enough of JSON Schema 2020-12 for the schemas in docs/openapi.yaml: $ref,
# type (one or a list), enum, required, properties, additionalProperties:
# false, items, allOf, minimum, maximum, exclusiveMinimum, pattern,
# minItems, maxItems, minLength, maxLength.

def resolve(ref):
    assert ref.startswith("#/"), ref
    node = SPEC
    for part in ref[2:].split("/"):
        node = node[part]
    return node


def type_ok(value, t):
    return {
        "null": value is None,
        "boolean": isinstance(value, bool),
        "integer": isinstance(value, int) and not isinstance(value, bool),
        "number": isinstance(value, (int, float)) and not isinstance(value, bool),
        "string": isinstance(value, str),
        "array": isinstance(value, list),
        "object": isinstance(value, dict),
    }[t]


def check_schema(value, schema, where="$"):
    """Return a list of problems (empty when value matches schema)."""
    if "$ref" in schema:
        return check_schema(value, resolve(schema["$ref"]), where)
    errs = []
    for sub in schema.get("allOf", []):
        errs += check_schema(value, sub, where)
    if "type" in schema:
        types = schema["type"] if isinstance(schema["type"], list) else [schema["type"]]
        if not any(type_ok(value, t) for t in types):
            return errs + [f"{where}: {value!r} is not of type {types}"]
    if "enum" in schema and value not in schema["enum"]:
        errs.append(f"{where}: {value!r} not in {schema['enum']}")
    if value is None:
        return errs
    if isinstance(value, dict):
        for k in schema.get("required", []):
            if k not in value:
                errs.append(f"{where}: missing required {k!r}")
        props = schema.get("properties", {})
        for k, v in value.items():
            if k in props:
                errs += check_schema(v, props[k], f"{where}.{k}")
            elif schema.get("additionalProperties") is False:
                errs.append(f"{where}: unexpected {k!r}")
    if isinstance(value, list):
        if "minItems" in schema and len(value) < schema["minItems"]:
            errs.append(f"{where}: fewer than {schema['minItems']} items")
        if "maxItems" in schema and len(value) > schema["maxItems"]:
            errs.append(f"{where}: more than {schema['maxItems']} items")
        for i, item in enumerate(value):
            if "items" in schema:
                errs += check_schema(item, schema["items"], f"{where}[{i}]")
    if isinstance(value, str):
        if "pattern" in schema and not re.search(schema["pattern"], value):
            errs.append(f"{where}: {value!r} does not match {schema['pattern']}")
        if "minLength" in schema and len(value) < schema["minLength"]:
            errs.append(f"{where}: shorter than {schema['minLength']}")
        if "maxLength" in schema and len(value) > schema["maxLength"]:
            errs.append(f"{where}: longer than {schema['maxLength']}")
    if type_ok(value, "number"):
        if "minimum" in schema and value < schema["minimum"]:
            errs.append(f"{where}: {value} < {schema['minimum']}")
        if "maximum" in schema and value > schema["maximum"]:
            errs.append(f"{where}: {value} > {schema['maximum']}")
        if "exclusiveMinimum" in schema and value <= schema["exclusiveMinimum"]:
            errs.append(f"{where}: {value} <= {schema['exclusiveMinimum']}")
    return errs


def test_schema_checker_can_fail():
    run = {"$ref": "#/components/schemas/RunCreated"}
    assert check_schema({"id": 3, "state": "queued"}, run) == []
    assert check_schema({"id": 3, "state": "done"}, run)
    assert check_schema({"id": "3", "state": "queued"}, run)
    assert check_schema({"state": "queued"}, run)
    err = {"$ref": "#/components/schemas/Error"}
    assert check_schema({"error": {"code": "x", "message": "y"}}, err) == []
    assert check_schema({"error": "x"}, err)


# ------------------------------------------------ the spec itself

def operations():
    """(path, method, operation) for every operation in the spec."""
    for path, item in SPEC["paths"].items():
        for m in METHODS:
            if m in item:
                yield path, m, item[m]


INTERFACE_ROUTES = {
    ("get", "/v1/health"), ("get", "/v1/stations"), ("post", "/v1/stations/{name}/halt"),
    ("get", "/v1/methods"), ("get", "/v1/methods/{id}"), ("put", "/v1/methods/{id}"),
    ("post", "/v1/runs"), ("get", "/v1/runs/{id}"), ("get", "/v1/runs/{id}/points"),
    ("get", "/v1/runs/{id}/curve.svg"), ("post", "/v1/runs/{id}/abort"),
    ("get", "/v1/results"), ("post", "/v1/calibrations"),
    ("post", "/v1/calibrations/{id}/next"), ("get", "/v1/calibrations/{id}"),
    ("get", "/v1/calibrations/latest"), ("get", "/metrics"),
}


def test_spec_has_every_interface_route():
    have = {(m, p) for p, m, _ in operations()}
    assert INTERFACE_ROUTES <= have, sorted(INTERFACE_ROUTES - have)


def test_spec_is_openapi_3_1_and_refs_resolve():
    assert SPEC["openapi"].startswith("3.1.")
    text = (ROOT / "docs" / "openapi.yaml").read_text()
    for ref in set(re.findall(r'\$ref: "([^"]+)"', text)):
        resolve(ref)
    ids = [op["operationId"] for _, _, op in operations()]
    assert len(ids) == len(set(ids)), "operationId used twice"


def is_write(method):
    return method in ("put", "post", "delete", "patch")


def test_spec_writes_need_bearer_and_document_401():
    for path, m, op in operations():
        if op.get("security") != [{}]:  # open even with http.read_needs_token
            assert "401" in op["responses"], f"{m} {path}: 401 not documented"
        if is_write(m):
            assert op.get("security") == [{"bearer": []}], f"{m} {path}: no bearer security"
        for status, resp in op["responses"].items():
            if "$ref" in resp:
                resp = resolve(resp["$ref"])
            if int(status) >= 400:
                schema = resp["content"]["application/json"]["schema"]
                assert schema == {"$ref": "#/components/schemas/Error"}, f"{m} {path} {status}"


def spec_path_regex(path):
    return re.compile("^" + re.sub(r"\\\{[^}]+\\\}", "[^/]+", re.escape(path)) + "$")


def test_daemon_source_routes_are_in_spec():
    """Every route literal in the daemon's HTTP sources names a spec path."""
    sources = sorted((ROOT / "daemon" / "server").glob("http*.c"))
    sources = [s for s in sources if not s.name.startswith("httpc")]  # the client
    assert sources, "no daemon/server/http*.c found"
    literals = set()
    for src in sources:
        literals |= set(re.findall(r'"(/(?:v1|metrics)[^"]*)"', src.read_text()))
    assert literals, "no route literals found in daemon/server/http*.c; adjust this test"
    spec_paths = list(SPEC["paths"])
    for lit in sorted(literals):
        # Prefix literals ("/v1/runs/") are matched as the start of a spec path,
        # whole ones with template segments as any value.
        ok = any(p == lit or p.startswith(lit) or spec_path_regex(p).match(lit)
                 for p in spec_paths)
        assert ok, f"daemon serves {lit!r}, which docs/openapi.yaml does not describe"


def test_route_table_is_the_spec():
    """The daemon's one route table has exactly the spec's operations, each
    with the spec's authorization: open where the spec says security [{}],
    a token always for a write, a token on request (http.read_needs_token)
    for any other read."""
    table = {(m.lower(), p): auth for m, p, auth in route_table()}
    spec = {(m, p): op for p, m, op in operations()}
    assert len(table) == len(route_table()), "a route is in the table twice"
    assert set(table) == set(spec), \
        f"only in the table: {sorted(set(table) - set(spec))}; " \
        f"only in the spec: {sorted(set(spec) - set(table))}"
    # A write's role is the spec's x-role (docs/api.md, "Roles"): operate
    # unless it says otherwise.
    by_role = {"operate": "WRITE", "review": "REVIEW", "admin": "ADMIN",
               "operate,admin": "CURATE"}
    for (m, p), auth in sorted(table.items()):
        want = ("OPEN" if spec[m, p].get("security") == [{}]
                else by_role[spec[m, p].get("x-role", "operate")] if is_write(m)
                else "READ")
        assert auth == want, f"{m.upper()} {p}: the table says {auth}, the spec {want}"


# ------------------------------------------------ the running daemon


def read_line(proc, deadline_s):
    """One line of proc's stdout within deadline_s, or ''."""
    import select
    end = time.monotonic() + deadline_s
    buf = b""
    while time.monotonic() < end:
        r, _, _ = select.select([proc.stdout], [], [], 0.2)
        if r:
            ch = os.read(proc.stdout.fileno(), 1)
            if not ch:
                break
            if ch == b"\n":
                return buf.decode(errors="replace")
            buf += ch
    return buf.decode(errors="replace")


class Api:
    def __init__(self, base, token):
        self.base = base
        self.token = token

    def call(self, method, path, body=None, token=True, ctype="application/json"):
        data = None
        headers = {}
        if body is not None:
            data = body if isinstance(body, bytes) else json.dumps(body).encode()
            headers["Content-Type"] = ctype
        if token and self.token:
            headers["Authorization"] = f"Bearer {self.token}"
        req = urllib.request.Request(self.base + path, data=data, method=method.upper(),
                                     headers=headers)
        try:
            with urllib.request.urlopen(req, timeout=10) as r:
                return r.status, r.headers.get("Content-Type", ""), r.read()
        except urllib.error.HTTPError as e:
            return e.code, e.headers.get("Content-Type", ""), e.read()


@contextlib.contextmanager
def bench(tmp, env=None, wrap=()):
    """stopcock-sim and a stopcockd driving it; yields (Api, daemon process).
    Both are stopped with SIGTERM at the end. `wrap` is a command the daemon
    runs under (e.g. strace); the process yielded is then the wrapper."""
    bins = build_dir() / "bin"
    for b in ("stopcockd", "stopcock-sim"):
        assert (bins / b).exists(), f"{bins / b} is not built"
    scenarios = sorted((ROOT / "config" / "scenarios").glob("*.yaml"))
    assert scenarios, "config/scenarios has no scenario to simulate"
    http_port = free_port()
    sim = subprocess.Popen(
        [str(bins / "stopcock-sim"), "--scenario", str(scenarios[0]),
         "--modbus-tcp", f"127.0.0.1:{free_port()}", "--pump-link", str(tmp / "pump"),
         "--control", str(tmp / "control"), "--config-out", str(tmp / "stopcockd.yaml"),
         "--state-dir", str(tmp), "--listen", f"127.0.0.1:{http_port}"],
        stdout=subprocess.PIPE, stderr=open(tmp / "sim.log", "wb"), cwd=ROOT)
    procs = [sim]
    try:
        line = read_line(sim, 20)
        assert line.strip() == "ready", \
            f"stopcock-sim said {line!r}:\n{(tmp / 'sim.log').read_text()}"
        d = subprocess.Popen([*wrap, str(bins / "stopcockd"), "-c", str(tmp / "stopcockd.yaml")],
                             stdout=subprocess.DEVNULL, stderr=open(tmp / "d.log", "wb"),
                             cwd=ROOT, env=env)
        procs.append(d)
        token = ""
        for ln in (tmp / "token").read_text().splitlines():
            ln = ln.strip()
            if ln and not ln.startswith("#"):
                token = ln.split(":", 1)[1] if ":" in ln else ln
                break
        api = Api(f"http://127.0.0.1:{http_port}", token)
        end = time.monotonic() + 30
        while True:
            try:
                if api.call("get", "/v1/health")[0] == 200:
                    break
            except OSError:
                pass
            assert d.poll() is None, f"stopcockd exited:\n{(tmp / 'd.log').read_text()}"
            assert time.monotonic() < end, \
                f"stopcockd never answered:\n{(tmp / 'd.log').read_text()}"
            time.sleep(0.2)
        yield api, d
    finally:
        for p in reversed(procs):
            if p.poll() is None:
                p.send_signal(signal.SIGTERM)
                try:
                    p.wait(timeout=15)
                except subprocess.TimeoutExpired:
                    p.kill()
                    p.wait()


@pytest.fixture(scope="module")
def daemon(tmp_path_factory):
    with bench(tmp_path_factory.mktemp("openapi")) as (api, _):
        yield api


# A method in mV, so a run needs no electrode calibration (Fernhill Water
# Co-op's bench check; the numbers only have to pass validation).
MV_METHOD = """\
method: openapi-mv
title: Route check in millivolts (Fernhill Water Co-op test bench)
revision: 1
purpose: assay
titrant: {name: NaOH 0.1 mol/L, molarity: 0.1000}
sample: {unit: mL, min: 1.0, max: 20.0}
signal: mv
start: {stir_s: 1, initial_ml: 0.0}
dosing:
  mode: constant
  dose_ml: 0.05
settle: {wait_min_s: 1, wait_max_s: 5, still_within: 2, still_for_s: 1}
detect:
  kind: inflection
  count: 1
  min_jump: 50
stop: {past_endpoint_ml: 0.5, volume_max_ml: 5.0, time_max_s: 120}
results:
  - name: volume
    formula: end1_ml
    unit: mL
    decimals: 3
"""


def op_for(method, path):
    return SPEC["paths"][path][method]


def documented(method, path, status, ctype, body):
    """Assert status is documented for the operation and the body fits."""
    op = op_for(method, path)
    codes = op["responses"]
    assert str(status) in codes, \
        f"{method.upper()} {path}: status {status} not documented ({sorted(codes)}): {body[:300]!r}"
    resp = codes[str(status)]
    if "$ref" in resp:
        resp = resolve(resp["$ref"])
    content = resp.get("content", {})
    base = ctype.split(";")[0].strip()
    assert base in content, f"{method.upper()} {path} {status}: content type {ctype!r} " \
        f"not documented ({sorted(content)})"
    if base == "application/json":
        value = json.loads(body)
        errs = check_schema(value, content[base]["schema"])
        assert not errs, f"{method.upper()} {path} {status}: " + "; ".join(errs[:10])
        return value
    return body


def test_every_operation_answers_as_documented(daemon):
    api = daemon
    called = set()

    def do(method, spec_path, path=None, body=None, ctype="application/json"):
        status, rtype, data = api.call(method, path or spec_path, body, ctype=ctype)
        called.add((method, spec_path))
        return status, documented(method, spec_path, status, rtype, data)

    st, health = do("get", "/v1/health")
    assert st == 200
    st, me = do("get", "/v1/whoami")
    assert st == 200 and "operate" in me["roles"], me
    st, stations = do("get", "/v1/stations")
    assert st == 200 and stations["stations"], "no station"
    station = stations["stations"][0]["name"]
    st, methods = do("get", "/v1/methods")
    assert st == 200 and methods["methods"], "no method loaded"
    mid = methods["methods"][0]["id"]
    st, method = do("get", "/v1/methods/{id}", f"/v1/methods/{mid}")
    assert st == 200 and method["id"] == mid
    # The same text again is accepted as unchanged (200) or stored (201).
    st, _ = do("put", "/v1/methods/{id}", f"/v1/methods/{mid}",
               body=method["text"].encode(), ctype="application/yaml")
    assert st in (200, 201), st

    st, page = do("get", "/")
    assert st == 200 and b"<html" in page.lower(), page[:100]
    st, _ = do("get", "/www/{name}", "/www/api.js")
    assert st == 200
    st, _ = do("get", "/www/{name}", "/www/no-such-file.js")
    assert st == 404
    st, chk = do("post", "/v1/methods/{id}/check", "/v1/methods/openapi-mv/check",
                 body=MV_METHOD.encode(), ctype="application/yaml")
    assert st == 200 and chk["valid"] and chk["saves"], chk
    st, chk = do("post", "/v1/methods/{id}/check", "/v1/methods/openapi-mv/check",
                 body=b"method: openapi-mv\nrevision: 0\n", ctype="application/yaml")
    assert st == 200 and not chk["valid"] and chk["diagnostics"], chk
    # A new method in mV (a pH method would need a calibration first): 201.
    st, put = do("put", "/v1/methods/{id}", "/v1/methods/openapi-mv",
                 body=MV_METHOD.encode(), ctype="application/yaml")
    assert st == 201, put
    # The same revision with other text is a conflict.
    st, _ = do("put", "/v1/methods/{id}", "/v1/methods/openapi-mv",
               body=MV_METHOD.replace("decimals: 3", "decimals: 2").encode(),
               ctype="application/yaml")
    assert st == 409
    st, _ = do("put", "/v1/methods/{id}", "/v1/methods/openapi-mv",
               body=b"method: openapi-mv\nrevision: 2\n", ctype="application/yaml")
    assert st == 422
    st, _ = do("post", "/v1/runs", body={"station": station, "method": mid,
                                         "sample_id": "FWC-openapi-0", "amount": "ten"})
    assert st == 400
    st, created = do("post", "/v1/runs", body={"station": station, "method": "openapi-mv",
                                               "sample_id": "FWC-openapi-1", "amount": 10})
    assert st == 201, created
    rid = created["id"]
    st, _ = do("get", "/v1/runs/{id}", f"/v1/runs/{rid}")
    assert st == 200
    st, _ = do("get", "/v1/runs/{id}/points", f"/v1/runs/{rid}/points")
    assert st == 200
    st, csv = do("get", "/v1/runs/{id}/points", f"/v1/runs/{rid}/points?format=csv")
    assert st == 200
    st, _ = do("get", "/v1/runs/{id}/curve.svg", f"/v1/runs/{rid}/curve.svg")
    st, pdf = do("get", "/v1/runs/{id}/report.pdf", f"/v1/runs/{rid}/report.pdf")
    assert st == 200 and pdf.startswith(b"%PDF-")
    st, _ = do("post", "/v1/runs/{id}/abort", f"/v1/runs/{rid}/abort")
    assert st in (200, 409)
    st, _ = do("post", "/v1/runs/{id}/abort", f"/v1/runs/{rid}/abort")
    assert st == 409, "aborting a final run must be a conflict"
    # The token that requested the run may not review it (four eyes), and an
    # aborted run has no results to correct.
    st, _ = do("post", "/v1/runs/{id}/review", f"/v1/runs/{rid}/review",
               body={"decision": "approve"})
    assert st == 409
    st, _ = do("post", "/v1/runs/{id}/correct", f"/v1/runs/{rid}/correct",
               body={"amount": 5.0, "reason": "spec"})
    assert st == 409
    st, _ = do("get", "/v1/runs/{id}", "/v1/runs/999999")
    assert st == 404
    # A series of one sample, aborted at once (docs/api.md, "Series").
    st, _ = do("post", "/v1/series", body={"station": station, "samples": []})
    assert st == 400
    st, ser = do("post", "/v1/series", body={"station": station, "samples": [
        {"sample_id": "FWC-openapi-s1", "method": "openapi-mv", "amount": 10,
         "position": [1]}]})
    assert st == 201, ser
    sid = ser["id"]
    st, _ = do("post", "/v1/series/{id}/next", f"/v1/series/{sid}/next")
    assert st == 409, "the first beaker needs no operator"
    # The row has a number as its amount: no weight to type.
    st, _ = do("post", "/v1/series/{id}/weight", f"/v1/series/{sid}/weight",
               body={"value": 10.0, "unit": "g", "reason": "openapi"})
    assert st == 409
    st, _ = do("post", "/v1/series/{id}/abort", f"/v1/series/{sid}/abort")
    assert st == 202
    end = time.monotonic() + 20
    while (one := do("get", "/v1/series/{id}", f"/v1/series/{sid}")[1])["state"] in (
            "queued", "running"):
        assert time.monotonic() < end, one
        time.sleep(0.2)
    assert one["state"] == "aborted", one
    st, _ = do("post", "/v1/series/{id}/abort", f"/v1/series/{sid}/abort")
    assert st == 409
    st, _ = do("get", "/v1/series/{id}", "/v1/series/999999")
    assert st == 404
    st, sl = do("get", "/v1/series", "/v1/series?limit=5")
    assert st == 200 and sl["series"][0]["id"] == sid, sl
    st, feed = do("get", "/v1/series/feed", "/v1/series/feed?after=0")
    assert st == 200 and [x["id"] for x in feed["series"]] == [sid], feed
    st, page = do("get", "/v1/results", "/v1/results?after=0&limit=10")
    assert st == 200
    st, ev = do("get", "/v1/events", "/v1/events?after=0&limit=50")
    assert st == 200 and ev["events"], ev
    assert any(e["kind"] == "run" and e["run_id"] == rid for e in ev["events"]), ev
    st, _ = do("get", "/v1/events", "/v1/events?after=-1")
    assert st == 400
    st, ver = do("get", "/v1/events/verify")
    assert st == 200 and ver["ok"], ver
    st, _ = do("post", "/v1/titrants", body={"name": "spec titrant", "titer": 1.0,
                                             "molarity": 0.1, "reason": "spec"})
    assert st == 201
    st, tl = do("get", "/v1/titrants", "/v1/titrants")
    assert st == 200 and isinstance(tl["titrants"], list), tl
    st, runs = do("get", "/v1/runs", f"/v1/runs?station={station}&limit=5")
    assert st == 200 and any(x["id"] == rid for x in runs["runs"]), runs
    st, _ = do("get", "/v1/runs", "/v1/runs?state=bogus")
    assert st == 400
    st, _ = do("post", "/v1/stations/{name}/halt", f"/v1/stations/{station}/halt")
    assert st == 200
    st, _ = do("post", "/v1/stations/{name}/halt", "/v1/stations/no-such-station/halt")
    assert st == 404
    st, body = do("post", "/v1/stations/{name}/resume", f"/v1/stations/{station}/resume")
    assert st == 200 and body["resumed"] is False, body
    st, _ = do("post", "/v1/stations/{name}/resume", "/v1/stations/no-such-station/resume")
    assert st == 404

    # A calibration; the station may still be winding down the aborted run.
    end = time.monotonic() + 10
    while True:
        st, cal = do("post", "/v1/calibrations",
                     body={"station": station, "buffers": [4.01, 7.00, 10.01]})
        if st != 409 or time.monotonic() > end:
            break
        time.sleep(0.5)
    assert st == 201, cal
    cid = cal["id"]
    st, _ = do("get", "/v1/calibrations/{id}", f"/v1/calibrations/{cid}")
    assert st == 200
    st, _ = do("post", "/v1/calibrations/{id}/next", f"/v1/calibrations/{cid}/next")
    assert st == 200
    st, _ = do("get", "/v1/calibrations/latest", f"/v1/calibrations/latest?station={station}")
    assert st in (200, 404)
    st, _ = do("post", "/v1/stations/{name}/halt", f"/v1/stations/{station}/halt")
    st, metrics = do("get", "/metrics")
    assert st == 200 and metrics.strip(), "empty /metrics"

    every = {(m, p) for p, m, _ in operations()}
    assert every <= called, f"operations not exercised: {sorted(every - called)}"


def test_writes_without_token_get_401(daemon):
    for path, m, op in operations():
        if not is_write(m):
            continue
        concrete = re.sub(r"\{[^}]+\}", "1", path)
        status, ctype, body = daemon.call(m, concrete, body={}, token=False)
        assert status == 401, f"{m.upper()} {path} without a token: {status}"
        documented(m, path, status, ctype, body)


def test_unknown_route_is_a_json_404(daemon):
    status, ctype, body = daemon.call("get", "/v1/no-such-route")
    assert status == 404
    assert check_schema(json.loads(body), {"$ref": "#/components/schemas/Error"}) == []


def test_every_spec_path_answers_options_with_its_allow(daemon):
    """Each spec path, asked with a method no route has (OPTIONS), without a
    token: 405 method_not_allowed with Allow listing exactly the spec's
    methods for it (GET bringing HEAD). Each of its spec methods is not a 405
    and not a "no such route"."""
    for path, item in SPEC["paths"].items():
        concrete = re.sub(r"\{[^}]+\}", "1", path)
        want = {m.upper() for m in METHODS if m in item}
        if "GET" in want:
            want.add("HEAD")
        req = urllib.request.Request(daemon.base + concrete, method="OPTIONS")
        with pytest.raises(urllib.error.HTTPError) as e:
            urllib.request.urlopen(req, timeout=10)
        body = e.value.read()
        assert e.value.code == 405, f"OPTIONS {concrete}: {e.value.code} {body[:200]!r}"
        assert json.loads(body)["error"]["code"] == "method_not_allowed"
        allow = {x.strip() for x in e.value.headers.get("Allow", "").split(",")}
        assert allow == want, f"OPTIONS {concrete}: Allow {allow}, the spec {want}"
        for m in want - {"HEAD"}:
            status, _, rb = daemon.call(m.lower(), concrete, token=False,
                                        body=None if m == "GET" else b"")
            msg = json.loads(rb)["error"]["message"] if status >= 400 and rb else ""
            assert status != 405 and not msg.startswith("no such route"), \
                f"{m} {concrete}: {status} {msg}"


def route_table():
    """(METHOD, pattern, authorization) for every row of the daemon's route
    table (daemon/server/http_routes.c)."""
    text = (ROOT / "daemon" / "server" / "http_routes.c").read_text()
    rows = re.findall(r'\{\s*"([A-Z]+)",\s*"(/[^"]*)",\s*\w+,\s*HTTP_(OPEN|READ|WRITE|REVIEW|ADMIN|CURATE)', text)
    assert rows, "no rows found in daemon/server/http_routes.c; adjust this test"
    return rows


def route_vocabulary():
    """{segment position: words} of the route table's literal segments."""
    words = {}
    for _, pattern, _ in route_table():
        for pos, seg in enumerate(s for s in pattern.split("/") if s):
            if not seg.startswith("{"):
                words.setdefault(pos, set()).add(seg)
    return {"http_routes.c": words} if words else {}


def spec_match(method, path):
    """The spec path that (method, path) is, or None; method None: any."""
    for p, m, _ in operations():
        if (method is None or m == method) and spec_path_regex(p).match(path):
            return p
    return None


def test_every_route_the_daemon_serves_is_in_spec(daemon):
    """Ask the daemon every path built from the literal segments of its route
    table (plus ids and names in the other places): whatever it does not
    answer with "no such route" must be in the spec. 405 (a known path, another
    method) needs the path in the spec with some method."""
    import itertools
    st, _, body = daemon.call("get", "/v1/stations")
    station = json.loads(body)["stations"][0]["name"]
    st, _, body = daemon.call("get", "/v1/methods")
    mid = json.loads(body)["methods"][0]["id"]
    fillers = ["1", "999999", station, mid]
    vocab = route_vocabulary()
    assert vocab, "no segment words found in daemon/server/http_routes.c; adjust this test"
    served = 0
    for fname, words in vocab.items():
        top = max(words)
        for n in range(1, top + 2):
            choices = []
            for k in range(n):
                opts = set(words.get(k, set()))
                if k >= 2:
                    opts |= set(fillers)
                choices.append(sorted(opts))
            if any(not c for c in choices):
                continue
            for segs in itertools.product(*choices):
                # Names where the route takes a name, numbers elsewhere.
                named = len(segs) > 1 and segs[1] in ("stations", "methods")
                if any(x in (station, mid) for x in segs[2:]) and not named:
                    continue
                path = "/" + "/".join(segs)
                for m in ("get", "post", "put"):
                    status, _, rb = daemon.call(m, path, body={} if m != "get" else None)
                    msg = json.loads(rb)["error"]["message"] if status >= 400 else ""
                    # "no such file": /www with no file name, or a file not there.
                    if status == 404 and msg.startswith(("no such route", "no such file")):
                        continue
                    # A route's id that is not a number (/v1/runs/x/points) is a
                    # 400 about the id: the same route was asked with a number.
                    if status == 400 and "id is a positive integer" in msg:
                        continue
                    # 405: a known path, another method. 400: the daemon checks an
                    # id in the path before the method. Either way the path must be
                    # in the spec with some method.
                    if status in (400, 405):
                        assert spec_match(None, path), \
                            f"{fname}: the daemon knows {path} ({status}), the spec does not"
                        continue
                    served += 1
                    assert spec_match(m, path), \
                        f"{fname}: the daemon serves {m.upper()} {path} ({status}), " \
                        "the spec does not describe it"
    assert served >= len(INTERFACE_ROUTES), f"only {served} routes answered"


def test_predicted_record_fits_run_schema():
    """A finished record with endpoints, results and points, from `stopcock
    predict --json` (the same serializer as GET /v1/runs/{id}). Only the
    fields a daemon fills in (id, station, sample id, queue time) are set
    here, since predict has none."""
    cmd = [str(build_dir() / "bin" / "stopcock"), "predict",
           str(ROOT / "config/methods/cider-acidity.yaml"),
           "--scenario", str(ROOT / "config/scenarios/cider-acidity.yaml"),
           "--amount", "10", "--json"]
    r = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    rec = json.loads(r.stdout)
    assert rec["endpoints"] and rec["results"] and rec["points"], "an empty prediction"
    rec.update(id=1, station="sim1", queued_at="2026-12-01T21:46:40.123Z")
    rec["sample"]["id"] = "OLC-2026-117"
    errs = check_schema(rec, {"$ref": "#/components/schemas/Run"})
    assert not errs, errs[:10]
    points = {"run": 1, "points": rec["points"]}
    errs = check_schema(points, {"$ref": "#/components/schemas/PointList"})
    assert not errs, errs[:10]


def test_spec_declares_every_path_parameter():
    for path, item in SPEC["paths"].items():
        names = set(re.findall(r"\{([^}]+)\}", path))
        for m in METHODS:
            if m not in item:
                continue
            params = item.get("parameters", []) + item[m].get("parameters", [])
            params = [resolve(p["$ref"]) if "$ref" in p else p for p in params]
            declared = {p["name"] for p in params if p["in"] == "path"}
            assert declared == names, f"{m} {path}: path parameters {declared} vs {names}"
            assert all(p.get("required") for p in params if p["in"] == "path")


def test_oversized_body_is_a_json_413(daemon):
    # Just over the default http.max_body_bytes (256 KiB), so the part the
    # daemon discards stays small.
    big = b"# " + b"x" * (257 * 1024) + b"\n"
    status, ctype, body = daemon.call("put", "/v1/methods/too-big", body=big,
                                      ctype="application/yaml")
    assert status == 413, status
    documented("put", "/v1/methods/{id}", status, ctype, body)
