"""Exposure: security headers always, and the access token off loopback."""

from __future__ import annotations

from fastapi.testclient import TestClient

from pellucid.web.app import create_app
from pellucid.web.security import CONTENT_SECURITY_POLICY, is_loopback
from pellucid.web.settings import Settings


def test_loopback_detection():
    assert is_loopback("127.0.0.1") and is_loopback("::1") and is_loopback("localhost") and is_loopback("127.8.0.1")
    assert not is_loopback("0.0.0.0") and not is_loopback("192.168.1.4") and not is_loopback("example.org")


def test_security_headers_on_pages_api_and_errors():
    with TestClient(create_app(Settings())) as client:
        for path in ("/", "/api/status", "/api/no-such-thing"):
            r = client.get(path)
            assert r.headers["content-security-policy"] == CONTENT_SECURITY_POLICY
            assert r.headers["x-content-type-options"] == "nosniff"
            assert r.headers["x-frame-options"] == "DENY"
        assert "frame-ancestors 'none'" in CONTENT_SECURITY_POLICY and "default-src 'self'" in CONTENT_SECURITY_POLICY


def test_token_required_off_loopback():
    app = create_app(Settings(host="0.0.0.0"))
    guard = app.state.guard
    with TestClient(app) as client:
        r = client.get("/api/status")
        assert r.status_code == 401 and "access token" in r.json()["detail"]
        assert client.get("/api/status", headers={"Authorization": "Bearer wrong"}).status_code == 401
        assert client.get("/api/status", headers={"Authorization": f"Bearer {guard.token}"}).status_code == 200
        assert client.get("/api/status", headers={"X-Pellucid-Token": guard.token}).status_code == 200


def test_sign_in_link_works_once_and_sets_a_cookie():
    app = create_app(Settings(host="0.0.0.0", token="s3cret-token-0123456789"))
    link = app.state.guard.sign_in_link("http://testserver")
    with TestClient(app) as client:
        r = client.get(link.replace("http://testserver", ""), follow_redirects=False)
        assert r.status_code == 303 and "HttpOnly" in r.headers["set-cookie"]
        assert client.get("/api/status").status_code == 200  # the cookie now rides along
    with TestClient(app) as fresh:
        r = fresh.get(link.replace("http://testserver", ""), follow_redirects=False)
        assert r.status_code == 401 and "already used" in r.json()["detail"]


def test_no_token_needed_on_loopback_by_default():
    app = create_app(Settings())
    assert app.state.guard is None
    with TestClient(app) as client:
        assert client.get("/api/status").status_code == 200
