"""The request screen (safety.md "Daemon API"): foreign Host or Origin 403, missing token 401,
oversize body 413, path tricks 400/404, wrong method 405.  Pass/fail, as the fault plan asks."""

from __future__ import annotations

import asyncio
import os
import warnings
from collections.abc import Iterator
from pathlib import Path

import pytest

with warnings.catch_warnings():  # starlette 1.x nags about httpx; the client works
    warnings.simplefilter("ignore", DeprecationWarning)
    from starlette.testclient import TestClient

from pycnoctl.controller.service.api import create_app
from pycnoctl.controller.service.daemon import Daemon
from pycnoctl.controller.service.security import COOKIE, Policy, TokenError, load_token, split_host
from pycnoctl.drivers.simulated import build_sim_instrument

TOKEN = "s3cret-token-for-the-test-0123456789"


@pytest.fixture(scope="module")
def daemon(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Daemon]:
    inst = build_sim_instrument(None)
    d = Daemon(inst, tmp_path_factory.mktemp("sec") / "data")
    d.start()
    yield d
    d.stop()
    d.catalog.close()
    inst.close()


@pytest.fixture(scope="module")
def local(daemon: Daemon) -> Iterator[TestClient]:
    with TestClient(create_app(daemon, Policy(port=8765)), base_url="http://127.0.0.1:8765") as c:
        yield c


@pytest.fixture(scope="module")
def open_bind(daemon: Daemon) -> Iterator[TestClient]:
    """As if bound to a LAN address with a token."""
    with TestClient(create_app(daemon, Policy(bind_host="192.0.2.10", port=8765, token=TOKEN)),
                    base_url="http://192.0.2.10:8765") as c:
        yield c


@pytest.mark.parametrize("host", ["evil.example", "evil.example:8765", "127.0.0.1.evil.example", "localhost:9999",
                                  "", "127.0.0.1@evil.example", "[::2]:8765"])
def test_foreign_host_is_403(local: TestClient, host: str) -> None:
    r = local.get("/api/status", headers={"host": host})
    assert r.status_code == 403


@pytest.mark.parametrize("host", ["127.0.0.1:8765", "localhost:8765", "localhost", "[::1]:8765"])
def test_own_host_names_pass(local: TestClient, host: str) -> None:
    assert local.get("/api/status", headers={"host": host}).status_code == 200


@pytest.mark.parametrize("origin", ["http://evil.example", "null", "http://127.0.0.1:9999", "file://",
                                    "http://localhost.evil.example:8765"])
def test_foreign_origin_is_403(local: TestClient, origin: str) -> None:
    assert local.get("/api/status", headers={"origin": origin}).status_code == 403
    assert local.post("/api/abort", headers={"origin": origin}).status_code == 403


def test_own_origin_passes(local: TestClient) -> None:
    assert local.get("/api/status", headers={"origin": "http://127.0.0.1:8765"}).status_code == 200
    assert local.get("/api/status", headers={"origin": "http://localhost:8765"}).status_code == 200


def test_non_loopback_bind_needs_a_token() -> None:
    with pytest.raises(TokenError):
        Policy(bind_host="0.0.0.0", port=8765)
    with pytest.raises(TokenError):
        Policy(bind_host="192.0.2.10", port=8765, token="")
    Policy(bind_host="127.0.0.1", port=8765)  # loopback: no token needed


def test_missing_or_wrong_token_is_401(open_bind: TestClient) -> None:
    r = open_bind.get("/api/status")
    assert r.status_code == 401 and r.headers["www-authenticate"].startswith("Bearer")
    assert open_bind.get("/api/status", headers={"authorization": "Bearer nope"}).status_code == 401
    assert open_bind.get("/api/status", headers={"authorization": f"Basic {TOKEN}"}).status_code == 401
    assert open_bind.get("/", headers={"cookie": f"{COOKIE}=wrong"}).status_code == 401
    assert open_bind.post("/api/abort").status_code == 401
    assert open_bind.get("/api/status", headers={"authorization": f"Bearer {TOKEN}"}).status_code == 200


def test_login_sets_a_strict_httponly_cookie(daemon: Daemon) -> None:
    app = create_app(daemon, Policy(bind_host="192.0.2.10", port=8765, token=TOKEN))
    with TestClient(app, base_url="http://192.0.2.10:8765", follow_redirects=False) as c:
        assert c.post("/login", data={"token": "wrong"}).status_code == 401
        r = c.post("/login", data={"token": TOKEN})
        assert r.status_code == 303
        cookie = r.headers["set-cookie"].lower()
        assert "httponly" in cookie and "samesite=strict" in cookie
        assert c.get("/api/status").status_code == 200  # the cookie now travels


def test_host_check_still_applies_with_a_token(open_bind: TestClient) -> None:
    r = open_bind.get("/api/status", headers={"authorization": f"Bearer {TOKEN}", "host": "evil.example:8765"})
    assert r.status_code == 403


def test_oversize_body_is_413(local: TestClient) -> None:
    big = b'{"sequence_text": "' + b"x" * (70 * 1024) + b'"}'
    r = local.post("/api/runs", content=big, headers={"content-type": "application/json"})
    assert r.status_code == 413

    def chunks() -> Iterator[bytes]:  # no Content-Length: the screen counts the bytes itself
        yield b'{"sequence_text": "'
        for _ in range(70):
            yield b"x" * 1024
        yield b'"}'

    r = local.post("/api/runs", content=chunks(), headers={"content-type": "application/json"})
    assert r.status_code == 413


def test_body_must_be_json(local: TestClient) -> None:
    r = local.post("/api/runs", content=b"sequence=quick-demo",
                   headers={"content-type": "application/x-www-form-urlencoded"})
    assert r.status_code == 415
    r = local.post("/api/runs", content=b"{not json", headers={"content-type": "application/json"})
    assert r.status_code == 400


def test_a_body_giving_a_key_twice_is_422_naming_it(local: TestClient, daemon: Daemon) -> None:
    # found by a sweep: a JSON parser keeps the last of two values silently, and the run was queued under
    # the second sample ID; which one the sender meant is not known, so nothing is queued
    before = len(daemon.catalog.list_runs(limit=1000))
    body = b'{"sequence": "quick-demo", "sample_id": "AL-0417", "operator": "ops", "sample_id": "AL-0418"}'
    r = local.post("/api/runs", content=body, headers={"content-type": "application/json"})
    assert r.status_code == 422 and "'sample_id' more than once" in r.json()["error"]
    nested = b'{"sequence": "quick-demo", "sample_id": "AL-0417", "note": {"a": 1, "a": 2}}'
    r = local.post("/api/runs", content=nested, headers={"content-type": "application/json"})
    assert r.status_code == 422 and "'a' more than once" in r.json()["error"]
    assert len(daemon.catalog.list_runs(limit=1000)) == before


def test_a_duplicate_key_refusal_has_the_documented_shape(local: TestClient) -> None:
    """Found by a sweep: the 422 was {"error", "status"} alone, while refusals are documented (docs/daemon.md)
    as {"error", "status", "problems"} with `field` naming the body's field a refusal is about."""
    from pycnoctl.controller.service.schemas import Error

    body = b'{"sequence": "quick-demo", "sample_id": "AL-0417", "sample_id": "AL-0418"}'
    r = local.post("/api/runs", content=body, headers={"content-type": "application/json"})
    assert r.status_code == 422
    said = r.json()
    Error.model_validate(said)
    assert said["status"] == 422 and said["field"] == "sample_id"
    assert said["problems"] == ["body.sample_id: given more than once"]
    nested = b'{"sequence": "quick-demo", "note": {"a": 1, "a": 2}}'  # the field is the body's own key
    said = local.post("/api/runs", content=nested, headers={"content-type": "application/json"}).json()
    assert said["field"] == "note" and said["problems"] == ["body.note.a: given more than once"]


@pytest.mark.parametrize("body", [b'{"a": 1, "a": 2} xx', b'{"sequence": "quick-demo", "x": {"k": 1, "k": 2}',
                                  b'[{"a": 1, "a": 2}]]'])
def test_text_that_is_not_json_is_400_even_with_a_key_twice(local: TestClient, body: bytes) -> None:
    """Found by a sweep: '{"a":1,"a":2} xx' (not JSON at all) was refused as giving 'a' more than once
    (422); it gets the 400 that any text which is not JSON gets."""
    plain = local.post("/api/runs", content=b"{not json", headers={"content-type": "application/json"})
    r = local.post("/api/runs", content=body, headers={"content-type": "application/json"})
    assert r.status_code == plain.status_code == 400
    assert r.json()["error"] == plain.json()["error"] == "the body is not valid JSON"


@pytest.mark.parametrize("path", ["/api/runs/..%2F..%2Fcatalog.sqlite", "/api/runs/catalog.sqlite",
                                  "/api/runs/R20250101T000000Z-abcdef", "/api/runs/%2Fetc%2Fpasswd/trace.csv",
                                  "/api/runs/R20251399T000000Z-abcdef/trace.csv", "/static/../catalog.sqlite",
                                  "/static/%2e%2e/catalog.sqlite", "/api/runs/R20250101T000000Z-ABCDEF/summary.json",
                                  "/api/queue/..%2Fx"])
def test_path_tricks_are_400_or_404(local: TestClient, path: str) -> None:
    r = local.request("DELETE" if path.startswith("/api/queue") else "GET", path)
    assert r.status_code in (400, 404), (path, r.status_code)
    assert "CREATE TABLE" not in r.text and "root:" not in r.text


def test_unknown_but_wellformed_run_is_404_and_malformed_is_400(local: TestClient) -> None:
    assert local.get("/api/runs/R20250101T000000Z-abcdef").status_code == 404
    assert local.get("/api/runs/not-a-run").status_code == 400


@pytest.mark.parametrize("method,path", [("DELETE", "/api/status"), ("GET", "/api/abort"), ("PUT", "/api/runs"),
                                         ("GET", "/api/reset"), ("POST", "/api/status"), ("GET", "/api/queue/resume")])
def test_wrong_method_is_405(local: TestClient, method: str, path: str) -> None:
    assert local.request(method, path).status_code == 405


def test_token_file_must_be_private(tmp_path: Path) -> None:
    f = tmp_path / "token"
    f.write_text(TOKEN + "\n")
    os.chmod(f, 0o644)
    with pytest.raises(TokenError):
        load_token(f, env={})
    os.chmod(f, 0o600)
    assert load_token(f, env={}) == TOKEN
    assert load_token(None, env={"PYCNOCTL_TOKEN": TOKEN}) == TOKEN
    assert load_token(None, env={}) is None
    with pytest.raises(TokenError):
        load_token(None, env={"PYCNOCTL_TOKEN": "short"})


def test_split_host() -> None:
    assert split_host("localhost:8765") == ("localhost", 8765)
    assert split_host("[::1]:8765") == ("::1", 8765)
    assert split_host("127.0.0.1") == ("127.0.0.1", None)
    for bad in ("a:b:c", "host:99999", "host:0", "[::1", "a/b", "u@h", ""):
        assert split_host(bad) is None, bad


def test_two_host_headers_are_refused(daemon: Daemon) -> None:
    app = create_app(daemon, Policy(port=8765))
    sent: list[dict] = []

    async def receive() -> dict:
        return {"type": "http.request", "body": b"", "more_body": False}

    async def send(msg: dict) -> None:
        sent.append(msg)

    for hosts in ([b"127.0.0.1:8765", b"evil.example"], [b"evil.example", b"127.0.0.1:8765"],
                  [b"127.0.0.1:8765", b"127.0.0.1:8765"]):
        sent.clear()
        scope = {"type": "http", "method": "GET", "path": "/api/status", "raw_path": b"/api/status",
                 "query_string": b"", "headers": [(b"host", h) for h in hosts], "root_path": "",
                 "scheme": "http", "server": ("127.0.0.1", 8765), "client": ("127.0.0.1", 5000),
                 "http_version": "1.1", "asgi": {"version": "3.0"}}
        asyncio.run(app(scope, receive, send))
        assert sent[0]["status"] == 400, hosts


def test_deeply_nested_json_is_a_4xx_not_a_500(local: TestClient) -> None:
    for depth in (1000, 32_000):
        body = b"[" * depth + b"]" * depth
        r = local.post("/api/runs", content=body, headers={"content-type": "application/json"})
        assert 400 <= r.status_code < 500, (depth, r.status_code)
        body = b'{"sequence": ' + b"[" * depth + b"]" * depth + b"}"
        r = local.post("/api/runs", content=body, headers={"content-type": "application/json"})
        assert 400 <= r.status_code < 500, (depth, r.status_code)


def test_the_token_never_travels_in_a_url(daemon: Daemon) -> None:
    app = create_app(daemon, Policy(bind_host="192.0.2.10", port=8765, token=TOKEN))
    with TestClient(app, base_url="http://192.0.2.10:8765", follow_redirects=False) as c:
        page = c.get("/login", params={"token": TOKEN})  # the old way: shows the form, sets nothing
        assert page.status_code == 200 and "set-cookie" not in page.headers
        assert 'method=post' in page.text and TOKEN not in page.text
        assert c.get("/api/status").status_code == 401
        # the form POST is screened like any request: another site's page cannot log a browser in
        r = c.post("/login", data={"token": TOKEN}, headers={"origin": "http://evil.example"})
        assert r.status_code == 403 and "set-cookie" not in r.headers
