# ruff: noqa: F811  (pytest fixtures imported from _store_helpers shadow their name)
"""The live page's JSON twins against its OpenAPI description (validated with jsonschema,
an independent JSON Schema 2020-12 implementation), fuzzed with hypothesis (no 500s), its
authentication (bearer token, scrypt password file per RFC 7914) and read-only store access.
"""

from __future__ import annotations

import base64
import io
import sqlite3
import subprocess
import sys
import zipfile
from pathlib import Path
from typing import Any
from urllib.parse import quote

import jsonschema
import pytest
from _pages_helpers import ROOT, copy_store, demo_dir  # noqa: F401  (fixture)
from _store_helpers import msg, pg_database, store, store_url  # noqa: F401  (fixtures)
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from starlette.testclient import TestClient

from agent.store.recorder import RecorderStore
from agent.web.app import create_app, open_read_only
from agent.web.auth import Auth, AuthError, hash_password, is_loopback
from agent.web.openapi import openapi_document


@pytest.fixture(scope="module")
def store_copy(demo_dir: Path, tmp_path_factory: pytest.TempPathFactory
               ) -> tuple[str, Path]:
    return copy_store(demo_dir, tmp_path_factory.mktemp("api-store"))


@pytest.fixture(scope="module")
def client(store_copy: tuple[str, Path]) -> TestClient:
    return TestClient(create_app(*store_copy, tz_name="Europe/Berlin"))


def _validate(doc: dict[str, Any], schema: str, value: Any) -> None:
    jsonschema.Draft202012Validator(
        {"$ref": f"#/components/schemas/{schema}", "components": doc["components"]},
        format_checker=jsonschema.FormatChecker()).validate(value)


def _response_schema(doc: dict[str, Any], path: str, status: int) -> str:
    content = doc["paths"][path]["get"]["responses"][str(status)]["content"]
    return str(content["application/json"]["schema"]["$ref"]).rsplit("/", 1)[-1]


def test_openapi_document_is_valid_openapi_31(client: TestClient) -> None:
    doc = client.get("/api/v1/openapi.json").json()
    assert doc == openapi_document()
    assert doc["openapi"].startswith("3.1")
    for name, schema in doc["components"]["schemas"].items():
        jsonschema.Draft202012Validator.check_schema(schema), name


def test_json_twins_validate_against_the_openapi_description(client: TestClient) -> None:
    doc = client.get("/api/v1/openapi.json").json()
    fleet = client.get("/api/v1/fleet")
    assert fleet.status_code == 200
    _validate(doc, _response_schema(doc, "/api/v1/fleet", 200), fleet.json())
    units = [u["device"] for u in fleet.json()["units"]]
    assert units == sorted(units) or len(units) == 3
    for device in units:
        unit = client.get(f"/api/v1/units/{device}")
        assert unit.status_code == 200
        _validate(doc, _response_schema(doc, "/api/v1/units/{device}", 200), unit.json())
        for fig in unit.json()["figures"]:
            svg = client.get(fig["url"])
            assert svg.status_code == 200 and svg.headers["content-type"] == "image/svg+xml"
            assert b"<svg" in svg.content[:200]
    events = client.get("/api/v1/events", params={"category": "sag"})
    _validate(doc, _response_schema(doc, "/api/v1/events", 200), events.json())
    assert events.json()["count"] >= 3  # the feeder-wide sag at every home (invented)
    missing = client.get("/api/v1/units/no-such-unit")
    assert missing.status_code == 404
    _validate(doc, _response_schema(doc, "/api/v1/units/{device}", 404), missing.json())
    bad = client.get("/api/v1/events", params={"since": "yesterday-ish"})
    assert bad.status_code == 400
    _validate(doc, _response_schema(doc, "/api/v1/events", 400), bad.json())


def test_html_pages_and_their_twins_show_the_same_units(client: TestClient) -> None:
    page = client.get("/")
    # Only its own scripts, styles and images (the browser test sees no CSP violations).
    assert "default-src 'self'" in page.headers["content-security-policy"]
    assert page.headers["x-content-type-options"] == "nosniff"
    html = page.text
    for unit in client.get("/api/v1/fleet").json()["units"]:
        assert f'data-device="{unit["device"]}"' in html
    assert html.count("not a certified instrument") == 1  # INDICATIVE once


def test_comtrade_download_reads_back_with_an_independent_reader(client: TestClient,
                                                                  tmp_path: Path) -> None:
    comtrade = pytest.importorskip("comtrade")
    unit = client.get("/api/v1/units/home-1").json()
    cap = unit["captures"][0]
    got = client.get(cap["comtrade_url"])
    assert got.status_code == 200 and got.headers["content-type"] == "application/zip"
    with zipfile.ZipFile(io.BytesIO(got.content)) as z:
        z.extractall(tmp_path)
        names = sorted(z.namelist())
    assert [Path(n).suffix for n in names] == [".cfg", ".dat"]
    rec = comtrade.Comtrade()
    rec.load(str(tmp_path / names[0]), str(tmp_path / names[1]))
    # IEEE C37.111: station = site, recording device = unit, line frequency from the model.
    assert rec.station_name == unit["site"] and rec.rec_dev_id == "home-1"
    assert rec.frequency == pytest.approx(60.0)
    assert rec.analog_count >= 1 and len(rec.time) > 100


_TEXT = st.text(st.characters(blacklist_categories=("Cs",)), max_size=40)


@settings(max_examples=100, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(path=st.sampled_from(["/api/v1/events", "/events", "/api/v1/units/{}", "/units/{}",
                             "/figures/units/{}/profile.svg", "/figures/captures/{}.svg",
                             "/captures/{}/comtrade.zip", "/api/v1/fleet"]),
       word=_TEXT, site=_TEXT, unit=_TEXT, category=_TEXT,
       since=st.one_of(_TEXT, st.floats(allow_nan=True).map(str),
                       st.integers().map(str)),
       until=st.one_of(_TEXT, st.floats(allow_nan=True).map(str)))
def test_fuzzed_requests_never_fail_with_500(client: TestClient, path: str, word: str,
                                            site: str, unit: str, category: str, since: str,
                                            until: str) -> None:
    url = path.format(quote(word, safe="") or "x")
    got = client.get(url, params={"site": site, "unit": unit, "category": category,
                                  "since": since, "until": until})
    assert got.status_code < 500, (url, got.status_code, got.text[:300])
    if got.headers.get("content-type", "").startswith("application/json"):
        got.json()


def test_store_is_opened_read_only(store_copy: tuple[str, Path], client: TestClient) -> None:
    url, captures = store_copy
    db_file = Path(url[len("sqlite:///"):])
    before = db_file.read_bytes()
    for path in ("/", "/api/v1/fleet", "/units/home-1", "/events"):
        assert client.get(path).status_code == 200
    assert db_file.read_bytes() == before
    store = open_read_only(url, captures)
    try:
        with pytest.raises(sqlite3.OperationalError, match=r"readonly|read-only|query_only"):
            store.db.execute("DELETE FROM events")
    finally:
        store.close()


def test_wrong_or_missing_token_is_401(store_copy: tuple[str, Path], tmp_path: Path) -> None:
    token = "t0ken-" + "x" * 30
    (tmp_path / "token").write_text(token + "\n")
    auth = Auth.load(str(tmp_path / "token"), None)
    c = TestClient(create_app(*store_copy, auth=auth))
    assert c.get("/api/v1/fleet").status_code == 401
    wrong = c.get("/api/v1/fleet", headers={"Authorization": "Bearer " + token[:-1] + "y"})
    assert wrong.status_code == 401 and wrong.headers["www-authenticate"].startswith("Bearer")
    assert c.get("/", headers={"Authorization": "Bearer " + token}).status_code == 200
    assert c.get("/static/hc.css").status_code == 401  # nothing is served without it
    assert c.get("/api/v1/fleet").headers["x-content-type-options"] == "nosniff"


def test_password_file_with_scrypt_hashes(store_copy: tuple[str, Path], tmp_path: Path) -> None:
    line = hash_password("correct horse battery")
    assert line.startswith("scrypt$16384$8$1$")
    assert hash_password("correct horse battery") != line  # salted
    (tmp_path / "users").write_text(f"# viewers\nmanager:{line}\n")
    c = TestClient(create_app(*store_copy, auth=Auth.load(None, str(tmp_path / "users"))))

    def basic(user: str, password: str) -> dict[str, str]:
        raw = base64.b64encode(f"{user}:{password}".encode()).decode()
        return {"Authorization": f"Basic {raw}"}

    assert c.get("/", headers=basic("manager", "correct horse battery")).status_code == 200
    assert c.get("/", headers=basic("manager", "wrong horse")).status_code == 401
    assert c.get("/", headers=basic("someone", "correct horse battery")).status_code == 401
    assert c.get("/", headers={"Authorization": "Basic !!!"}).status_code == 401
    (tmp_path / "bad").write_text("manager:plaintext\n")
    with pytest.raises(AuthError, match="bad:1"):
        Auth.load(None, str(tmp_path / "bad"))
    (tmp_path / "short").write_text("abc\n")
    with pytest.raises(AuthError, match="16"):
        Auth.load(str(tmp_path / "short"), None)


def _serve(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "agent.cli.main", "serve", *args],
                          capture_output=True, text=True, timeout=60, cwd=ROOT, check=False)


def test_non_loopback_bind_without_auth_is_refused(store_copy: tuple[str, Path]) -> None:
    url, captures = store_copy
    for bind in ("0.0.0.0:8080", "192.0.2.10:8080", "[::]:8080"):  # 192.0.2.x: RFC 5737
        done = _serve("--store", url, "--captures", str(captures), "--bind", bind)
        assert done.returncode == 2, done.stderr
        assert "needs authentication" in done.stderr
        assert len(done.stderr.strip().splitlines()) == 1 and "Traceback" not in done.stderr
    assert is_loopback("127.0.0.1") and is_loopback("::1") and is_loopback("localhost")
    assert not is_loopback("0.0.0.0") and not is_loopback("10.0.0.1")


def test_serve_bad_options_are_one_line(store_copy: tuple[str, Path], tmp_path: Path) -> None:
    url, _ = store_copy
    for args, words in ((["--store", "sqlite:///" + str(tmp_path / "none.db")], "no SQLite"),
                        (["--store", url, "--bind", "nonsense"], "HOST:PORT"),
                        (["--store", url, "--tz", "Nowhere/Town"], "time zone"),
                        (["--store", url, "--token-file", str(tmp_path / "missing")],
                         "--token-file")):
        done = _serve(*args)
        assert done.returncode == 2 and words in done.stderr, (args, done.stderr)
        assert "Traceback" not in done.stderr


def test_hash_password_command_prints_a_usable_line(tmp_path: Path) -> None:
    done = subprocess.run([sys.executable, "-m", "agent.cli.main", "serve", "--hash-password",
                           "viewer"], input="long enough secret\n", capture_output=True,
                          text=True, timeout=60, cwd=ROOT, check=False)
    assert done.returncode == 0, done.stderr
    (tmp_path / "users").write_text(done.stdout)
    auth = Auth.load(None, str(tmp_path / "users"))
    assert auth is not None
    raw = base64.b64encode(b"viewer:long enough secret").decode()
    assert auth.allows(f"Basic {raw}")


@pytest.mark.parametrize("store_url", ["sqlite", "postgresql"], indirect=True)
def test_live_page_over_both_store_engines_is_read_only(store: RecorderStore, store_url: str,
                                                        tmp_path: Path) -> None:
    model = {"nominal_v": 230.0, "nominal_hz": 50.0, "measurement_point": "service"}
    store.commit_batch([msg("status", 1, device="flat-7", state="online", t=1_700_000_000.0,
                            site_model=model, outbox_depth=12)])
    c = TestClient(create_app(store_url, tmp_path / "captures"))
    fleet = c.get("/api/v1/fleet").json()
    assert [(u["device"], u["outbox_backlog"]) for u in fleet["units"]] == [("flat-7", 12)]
    unit = c.get("/api/v1/units/flat-7").json()
    # EN 50160 for a 50-Hz supply: 230 V ±10 % = 207–253 V (pub).
    assert (unit["bands"][0]["low_v"], unit["bands"][0]["high_v"]) == (207.0, 253.0)
    ro = open_read_only(store_url, tmp_path / "captures")
    try:
        with pytest.raises(Exception, match=r"(?i)read.?only|query_only"):
            ro.db.execute("DELETE FROM devices")
    finally:
        ro.close()
    assert [d["device"] for d in store.devices()] == ["flat-7"]
