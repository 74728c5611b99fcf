"""HTTP protocol corners, sent over raw sockets (docs/api.md, "What the
server refuses"; issue 18 item 11): HEAD on the GET routes, 405 with Allow
before authentication, one Authorization header without NUL, request
framing (Content-Length, Transfer-Encoding, chunk sizes), query arguments
(count, NUL, repeats, dates) and the Host check against DNS rebinding.
Each refusal comes at once, as a JSON error, and the daemon keeps
answering."""
import json
import re
import socket
import time

import pytest
import yaml

import reliability_bench as rb

ROOT = rb.HERE.parent
SPEC = yaml.safe_load((ROOT / "docs" / "openapi.yaml").read_text())


@pytest.fixture(scope="module")
def bench(tmp_path_factory):
    b = rb.Bench(tmp_path_factory.mktemp("protocol"),
                 http={"allowed_hosts": ["localhost", "bench.example"],
                       "request_deadline_s": 5})
    yield b
    b.close()


def send(bench, data, limit_s=3.0):
    """Send raw bytes; return (status, headers dict, body, seconds to the
    answer's headers). Status 0: nothing came."""
    s = socket.create_connection(("127.0.0.1", bench.port), timeout=limit_s)
    t0 = time.monotonic()
    out, took, want = b"", None, None
    try:
        s.sendall(data)
        end = t0 + limit_s
        while time.monotonic() < end and (want is None or len(out) < want):
            s.settimeout(max(0.05, end - time.monotonic()))
            try:
                b = s.recv(65536)
            except (socket.timeout, OSError):
                break
            if not b:
                break
            out += b
            if want is None and b"\r\n\r\n" in out:
                took = time.monotonic() - t0
                m = re.search(rb"\r\ncontent-length:\s*(\d+)", out, re.I)
                want = out.index(b"\r\n\r\n") + 4 + (int(m.group(1)) if m else 0)
    finally:
        s.close()
    head, _, body = out.partition(b"\r\n\r\n")
    m = re.match(rb"HTTP/1\.[01] (\d{3})", head)
    headers = {}
    for line in head.split(b"\r\n")[1:]:
        k, _, v = line.partition(b":")
        headers[k.decode().strip().lower()] = v.decode().strip()
    return (int(m.group(1)) if m else 0), headers, body, \
        (took if took is not None else time.monotonic() - t0)


def request(verb, path, headers=(), body=b"", host="127.0.0.1", version="HTTP/1.1"):
    lines = [f"{verb} {path} {version}".encode()]
    if host is not None:
        lines.append(b"Host: " + host.encode())
    lines.append(b"Connection: close")
    lines += [h if isinstance(h, bytes) else h.encode() for h in headers]
    return b"\r\n".join(lines) + b"\r\n\r\n" + body


def error_code(body):
    return json.loads(body)["error"]["code"]


def concrete(path):
    return path.replace("{name}", "sim1").replace("{id}", "1")


GET_PATHS = [concrete(p) for p, ops in SPEC["paths"].items() if "get" in ops]


# ---- HEAD ----

@pytest.mark.parametrize("path", GET_PATHS)
def test_head_answers_like_get_without_a_body(bench, path):
    if path == "/www/{name}":
        path = "/www/app.js"
    path = concrete(path)
    if "calibrations/latest" in path:
        path += "?station=sim1"
    g_status, g_headers, g_body, _ = send(bench, request("GET", path))
    h_status, h_headers, h_body, _ = send(bench, request("HEAD", path))
    assert h_status == g_status, (path, h_status, g_status)
    assert h_body == b"", (path, h_body[:100])
    assert h_headers.get("content-type") == g_headers.get("content-type")


def test_head_on_health_is_200(bench):
    status, headers, body, _ = send(bench, request("HEAD", "/v1/health"))
    assert status == 200 and body == b"" and int(headers["content-length"]) > 0


# ---- 405 with Allow, before authentication ----

def allowed(path):
    ops = {m.upper() for m in SPEC["paths"][path] if m in ("get", "put", "post", "delete",
                                                           "patch")}
    if "GET" in ops:
        ops.add("HEAD")
    return ops


@pytest.mark.parametrize("path", list(SPEC["paths"]))
def test_wrong_method_is_405_with_allow_before_the_token(bench, path):
    for verb in ("DELETE", "PATCH", "PUT", "POST", "GET"):
        if verb in allowed(path):
            continue
        status, headers, body, _ = send(bench, request(verb, concrete(path),
                                                       ["Content-Length: 0"]))
        assert status == 405, (verb, path, status, body[:200])
        assert set(x.strip() for x in headers["allow"].split(",")) == allowed(path), headers
        assert error_code(body) == "method_not_allowed"


# ---- Authorization ----

def halt_with(bench, *auth_lines):
    return send(bench, request("POST", "/v1/stations/sim1/halt",
                               ["Content-Length: 0", *auth_lines]))


def test_one_good_authorization_header_is_accepted(bench):
    status, _, body, _ = halt_with(bench, f"Authorization: Bearer {bench.token}")
    assert status == 200, body


def test_two_authorization_headers_are_refused(bench):
    for lines in ([f"Authorization: Bearer {bench.token}", "Authorization: Bearer junk"],
                  ["Authorization: Bearer junk", f"Authorization: Bearer {bench.token}"],
                  [f"Authorization: Bearer {bench.token}"] * 2):
        status, _, body, _ = halt_with(bench, *lines)
        assert status == 400 and error_code(body) == "bad_request", (lines, status, body)


def test_a_nul_or_junk_in_the_authorization_header_is_refused(bench):
    tok = bench.token.encode()
    for line in (b"Authorization: Bearer " + tok + b"\x00junk",
                 b"Authorization: Bearer " + tok + b"\x00",
                 b"Authorization: Bearer " + tok + b" junk",
                 b"Authorization: Bearer " + tok[:-1] + b"\x00" + tok[-1:]):
        status, _, body, _ = halt_with(bench, line)
        assert status in (400, 401), (line, status, body)
    # And a NUL in any other header too.
    status, _, body, _ = halt_with(bench, b"X-Note: a\x00b", f"Authorization: Bearer {bench.token}")
    assert status == 400, body


# ---- framing ----

def test_conflicting_content_lengths_are_refused_and_the_connection_closed(bench):
    req = request("POST", "/v1/stations/sim1/halt",
                  [f"Authorization: Bearer {bench.token}", "Content-Length: 0",
                   "Content-Length: 5"], b"hello")
    status, headers, body, took = send(bench, req)
    assert status == 400 and error_code(body) == "bad_request", (status, body)
    assert headers.get("connection") == "close"
    for cl in ("5, 5", "-1", "0x10", "1e3"):
        status, _, body, _ = send(bench, request("POST", "/v1/stations/sim1/halt",
                                                 [f"Authorization: Bearer {bench.token}",
                                                  f"Content-Length: {cl}"], b"hello"))
        assert status == 400, (cl, status, body)


@pytest.mark.parametrize("coding,want", [
    ("gzip", 501), ("chunked, gzip", 501), ("identity", 501), ("chunked", 411)])
def test_transfer_encodings_are_answered_at_once(bench, coding, want):
    # The body never comes: the answer must not wait for it.
    req = request("PUT", "/v1/methods/fast-acid-mv",
                  [f"Authorization: Bearer {bench.token}", f"Transfer-Encoding: {coding}"])
    status, headers, body, took = send(bench, req)
    assert status == want, (coding, status, body)
    assert took < 1.0, took
    assert headers.get("connection") == "close"
    json.loads(body)


@pytest.mark.parametrize("size", [b"7fffffff", b"ffffffffffffffff", b"fffffffffffffffffffff"])
def test_absurd_chunk_sizes_are_answered_at_once(bench, size):
    req = request("PUT", "/v1/methods/fast-acid-mv",
                  [f"Authorization: Bearer {bench.token}", "Transfer-Encoding: chunked"],
                  size + b"\r\nabc")
    status, _, _, took = send(bench, req)
    assert status in (400, 411, 413, 501), (size, status)
    assert took < 1.0, took


def test_chunked_with_a_content_length_is_refused(bench):
    req = request("POST", "/v1/stations/sim1/halt",
                  [f"Authorization: Bearer {bench.token}", "Transfer-Encoding: chunked",
                   "Content-Length: 3"], b"0\r\n\r\n")
    status, _, body, _ = send(bench, req)
    assert status == 400, body


# ---- query arguments ----

def test_many_query_arguments_are_refused_not_dropped(bench):
    for n in (33, 500, 2000):
        q = "&".join(f"x{i}=1" for i in range(n)) + "&after=5"
        status, _, body, took = send(bench, request("GET", f"/v1/results?{q}"))
        assert status in (400, 414), (n, status, body[:200])
        assert took < 1.0, (n, took)
    # A handful is fine.
    status, _, body, _ = send(bench, request("GET", "/v1/results?after=0&limit=5"))
    assert status == 200, body


@pytest.mark.parametrize("query", [
    "after=1%00abc", "after=1&after=2", "limit=5%00", "after=%00",
    "a%00b=1", "since=2026-01-01&since=2026-02-01"])
def test_nul_and_repeated_arguments_are_refused(bench, query):
    path = "/v1/runs" if "since" in query else "/v1/results"
    status, _, body, _ = send(bench, request("GET", f"{path}?{query}"))
    assert status == 400 and error_code(body) == "bad_request", (query, status, body)


@pytest.mark.parametrize("when", [
    "2026-13-01", "2026-02-30", "2025-02-29", "2026-00-10", "2026-01-01T24:00",
    "2026-01-01T12:60", "2026-1-1", "2026-01-01 12:00", "0000-01-01", "1%00abc",
    "2026-01-01TZ", "2026-01-01T12:00:00.Z", "20260101", "2026-01-01T12.5"])
def test_invalid_dates_are_refused(bench, when):
    status, _, body, _ = send(bench, request("GET", f"/v1/runs?since={when}"))
    assert status == 400, (when, status, body)


@pytest.mark.parametrize("when", [
    "2026", "2026-12", "2026-12-01", "2024-02-29", "2026-12-01T14", "2026-12-01T14:00",
    "2026-12-01T14:00:00Z", "2026-12-01T14:00:00.125Z"])
def test_valid_dates_are_taken(bench, when):
    status, _, body, _ = send(bench, request("GET", f"/v1/runs?since={when}&until=2100"))
    assert status == 200, (when, status, body)


# ---- Host ----

@pytest.mark.parametrize("path", ["/v1/stations", "/v1/results?after=0", "/", "/v1/health"])
def test_a_foreign_host_cannot_read(bench, path):
    for host in ("evil.example", f"evil.example:{bench.port}", "localhost.evil.example",
                 "127.0.0.1.nip.io", "bench.example.evil"):
        status, _, body, _ = send(bench, request("GET", path, host=host))
        assert status == 421, (host, path, status)
        assert error_code(body) == "unknown_host"


@pytest.mark.parametrize("host", ["127.0.0.1", "127.0.0.1:{port}", "localhost",
                                  "LocalHost:{port}", "localhost.", "[::1]:{port}",
                                  "bench.example", "Bench.Example:{port}"])
def test_ip_addresses_and_allowed_names_are_served(bench, host):
    status, _, body, _ = send(bench, request("GET", "/v1/stations",
                                             host=host.format(port=bench.port)))
    assert status == 200, (host, status, body)


def test_host_must_be_given_once_in_http_1_1(bench):
    status, _, _, _ = send(bench, request("GET", "/v1/health", host=None))
    assert status == 400
    status, _, _, _ = send(bench, request("GET", "/v1/health", ["Host: evil.example"]))
    assert status == 400
    # HTTP/1.0 has no Host requirement (and no browser sends it so).
    status, _, _, _ = send(bench, request("GET", "/v1/health", host=None, version="HTTP/1.0"))
    assert status == 200


def test_the_daemon_still_answers(bench):
    assert bench.get("/v1/health")["status"] == "ok"
