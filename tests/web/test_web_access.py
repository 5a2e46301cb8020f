"""Who may do what: the serve command refuses other machines without a secret, viewers
only read, editors also change, CSRF still holds, the secret key is per
installation, and every response carries the security headers.

The secrets below are invented for these tests.
"""

from __future__ import annotations

import re
import time

import pytest

from sillmark.cli import build_parser, main, serve_refusal
from tests.web_support import analysed_site, make_app, write_lowbank
from sillmark.web import auth
from sillmark.web import config as web_config

VIEWER_SECRET = "lowbank-viewer-secret-41"
EDITOR_SECRET = "lowbank-editor-secret-97"
READ = {"GET", "HEAD", "OPTIONS"}


# --------------------------------------------------------------------------- sillmark serve


def test_serve_listens_on_loopback_by_default():
    args = build_parser().parse_args(["serve"])
    assert args.host == "127.0.0.1"


@pytest.fixture
def no_server(monkeypatch):
    """waitress.serve replaced by a recorder: no real server is started."""
    import waitress

    calls = []
    monkeypatch.setattr(waitress, "serve", lambda app, **o: calls.append((app, o)))
    monkeypatch.setitem(web_config.DEFAULTS, "REGISTER_DEMO", False)
    monkeypatch.setitem(web_config.DEFAULTS, "JOB_RUNNER", "inline")
    for env in web_config.SECRET_ENV.values():
        monkeypatch.delenv(env, raising=False)
    return calls


@pytest.mark.parametrize("host", ["0.0.0.0", "::", "192.168.10.7", "fd00::5", "caddlewick-server"])
def test_serve_on_a_network_host_refuses_to_start_without_a_secret(no_server, capsys, tmp_path, host):
    data = tmp_path / "data"
    assert main(["serve", "--host", host, "--data", str(data)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("sillmark: error:") and "SILLMARK_EDITOR_SECRET" in err and host in err
    assert no_server == [] and not data.exists()  # refused before anything was started or made


@pytest.mark.parametrize("host", ["127.0.0.1", "127.0.0.2", "::1", "localhost"])
def test_loopback_hosts_need_no_secret(host):
    assert auth.serving_refusal(host, dict(web_config.DEFAULTS)) is None


def test_serve_starts_on_a_network_host_with_an_editor_secret(no_server, monkeypatch, capsys, tmp_path):
    monkeypatch.setenv("SILLMARK_EDITOR_SECRET", EDITOR_SECRET)
    assert main(["serve", "--host", "0.0.0.0", "--data", str(tmp_path / "d")]) == 0
    (app, options), = no_server
    assert options["host"] == "0.0.0.0"
    assert app.config["EDITOR_SECRET"] == EDITOR_SECRET
    assert app.test_client().get("/api/sites").status_code == 401  # the started app asks for a sign-in


def test_the_secret_may_come_from_the_data_folders_config(no_server, tmp_path):
    data = tmp_path / "data"
    data.mkdir()
    args = build_parser().parse_args(["serve", "--host", "0.0.0.0", "--data", str(data)])
    assert serve_refusal(args) is not None
    (data / "config.py").write_text(f"EDITOR_SECRET = {EDITOR_SECRET!r}\n", encoding="utf-8")
    assert serve_refusal(args) is None


@pytest.mark.parametrize("settings,fragment", [
    ({"EDITOR_SECRET": "short"}, "shorter than 12"),
    ({"VIEWER_SECRET": VIEWER_SECRET}, "EDITOR_SECRET is not"),
    ({"EDITOR_SECRET": EDITOR_SECRET, "VIEWER_SECRET": EDITOR_SECRET}, "the same"),
])
def test_unusable_secrets_are_refused_on_every_host(settings, fragment):
    for host in ("127.0.0.1", "0.0.0.0"):
        assert fragment in auth.serving_refusal(host, {**web_config.DEFAULTS, **settings})
    with pytest.raises(auth.AccessNotConfigured, match=fragment):
        auth.check_secrets(settings)


# --------------------------------------------------------------------------- an app with secrets


class Visitor:
    """A test client that signs in with ``secret`` (or stays signed out) and sends the form token."""

    def __init__(self, app, secret: str | None = None) -> None:
        self.raw = app.test_client()
        self.raw.get("/signin")
        if secret is not None:
            r = self.raw.post("/signin", data={"secret": secret, "next": "/",
                                               "csrf_token": self.session_token()})
            assert r.status_code == 303, r.get_data(as_text=True)
            assert self.raw.get("/").status_code == 200  # a page: the new session gets its token

    def session_token(self) -> str:
        with self.raw.session_transaction() as s:
            return s["csrf"]

    def get(self, url, **k):
        r = self.raw.get(url, **k)
        r.get_data()
        r.close()
        return r

    def post(self, url, *, headers=None, **k):
        h = {"X-Sillmark-Token": self.session_token()}
        h.update(headers or {})
        r = self.raw.post(url, headers=h, **k)
        r.get_data()
        r.close()
        return r


@pytest.fixture(scope="module")
def guarded(tmp_path_factory):
    """(app, site_id, run_id): an app with both secrets and one analysed site."""
    folder = tmp_path_factory.mktemp("access")
    app = make_app(folder / "data", EDITOR_SECRET=EDITOR_SECRET, VIEWER_SECRET=VIEWER_SECRET,
                   SIGNIN_DELAY=0.01)
    editor = Visitor(app, EDITOR_SECRET)
    site_id = analysed_site(editor, write_lowbank(folder / "lowbank.tif"))
    run_id = editor.get(f"/api/sites/{site_id}").get_json()["current_run"]
    return app, site_id, run_id


SAMPLE = {"depression_id": 1, "scenario_id": 1, "level": "10.5", "offset": "0.5", "z": 18, "x": 141449, "y": 92100,
          "name": "summary.json", "kind": "depth", "filename": "css/sillmark.css"}


def routes(app, site_id: int, run_id: int, *, changing: bool) -> list[tuple[str, str, str]]:
    """(endpoint, method, url) of every route of the app: the reading or the changing ones."""
    adapter = app.url_map.bind("localhost")
    values = dict(SAMPLE, site_id=site_id, run_id=run_id)
    out = []
    for rule in app.url_map.iter_rules():
        for method in sorted(rule.methods - {"HEAD", "OPTIONS"}):
            if (method not in READ) != changing:
                continue
            url = adapter.build(rule.endpoint, {k: values[k] for k in rule.arguments}, method=method)
            out.append((rule.endpoint, method, url))
    return out


def test_every_route_is_either_reading_or_changing(guarded):
    app, site_id, run_id = guarded
    changing = {e for e, _, _ in routes(app, site_id, run_id, changing=True)}
    reading = {e for e, _, _ in routes(app, site_id, run_id, changing=False)}
    # The routes this test is known to cover; a new one is covered by the loops below.
    assert {"uploads.dem", "uploads.settings", "uploads.assets", "api.rerun", "api.barrier"} <= changing
    assert {"pages.site", "api.stage", "tiles.water", "tiles.hillshade", "api.level_zip", "static"} <= reading


def test_signed_out_visitors_are_sent_to_sign_in_or_get_401(guarded):
    app, site_id, run_id = guarded
    anon = Visitor(app)
    r = anon.get(f"/sites/{site_id}")
    assert r.status_code == 303 and r.headers["Location"].startswith("/signin?next=")
    for endpoint, method, url in routes(app, site_id, run_id, changing=False):
        if endpoint in auth.OPEN_ENDPOINTS:
            continue
        r = anon.get(url, headers={"Accept": "application/json"})
        assert r.status_code == 401, (url, r.status_code)
        assert "sign in first" in r.get_json()["error"]
    for endpoint, method, url in routes(app, site_id, run_id, changing=True):
        if endpoint in auth.OPEN_ENDPOINTS:
            continue
        r = anon.post(url, headers={"Accept": "application/json"})
        assert r.status_code == 401, (url, r.status_code)  # before the form token is even looked at


def test_static_files_and_the_sign_in_page_are_open(guarded):
    app, _, _ = guarded
    anon = Visitor(app)
    assert anon.get("/static/css/sillmark.css").status_code == 200
    page = anon.get("/signin")
    assert page.status_code == 200 and "Access secret" in page.get_data(as_text=True)
    from sillmark import SCREENING_CAUTION

    assert SCREENING_CAUTION in page.get_data(as_text=True)


def test_a_viewer_reads_everything_and_changes_nothing(guarded):
    app, site_id, run_id = guarded
    viewer = Visitor(app, VIEWER_SECRET)
    for endpoint, method, url in routes(app, site_id, run_id, changing=False):
        r = viewer.get(url)
        assert r.status_code not in (401, 403), (url, r.status_code)
        assert r.status_code < 500
    assert viewer.get(f"/api/sites/{site_id}/stage?level=10.5").get_json()["flooded_area_m2"] > 0
    runs_before = viewer.get(f"/api/sites/{site_id}/status").get_json()["run"]["id"]
    for endpoint, method, url in routes(app, site_id, run_id, changing=True):
        if endpoint in auth.OPEN_ENDPOINTS:
            continue
        r = viewer.post(url, headers={"Accept": "application/json"}, data=b"x")
        assert r.status_code == 403, (url, r.status_code)
        assert "signed in as a viewer" in r.get_json()["error"]
    assert viewer.get(f"/api/sites/{site_id}/status").get_json()["run"]["id"] == runs_before


def test_pages_offer_viewers_no_editing_and_editors_all_of_it(guarded):
    app, site_id, _ = guarded
    viewer, editor = Visitor(app, VIEWER_SECRET), Visitor(app, EDITOR_SECRET)
    for url in ("/", f"/sites/{site_id}"):
        seen = viewer.get(url).get_data(as_text=True)
        assert 'href="/sites/new"' not in seen, url
        assert f'href="/sites/{site_id}/settings"' not in seen, url
        assert ">viewer</a>" in seen
        mine = editor.get(url).get_data(as_text=True)
        assert 'href="/sites/new"' in mine and ">editor</a>" in mine, url
    page = viewer.get(f"/sites/{site_id}").get_data(as_text=True)
    assert 'id="assets-form" class="inline-upload" hidden' in page
    assert "need the editor secret" in page
    # Drawing a scenario's edits on the map is for editors only.
    assert 'id="edit-draw"' not in page
    assert 'id="edit-draw"' in editor.get(f"/sites/{site_id}").get_data(as_text=True)


def test_an_editor_reads_and_changes(guarded):
    app, site_id, run_id = guarded
    editor = Visitor(app, EDITOR_SECRET)
    for endpoint, method, url in routes(app, site_id, run_id, changing=False):
        assert editor.get(url).status_code not in (401, 403), url
    for endpoint, method, url in routes(app, site_id, run_id, changing=True):
        if endpoint in auth.OPEN_ENDPOINTS:
            continue
        r = editor.post(url, headers={"Accept": "application/json"})
        assert r.status_code not in (401, 403) and r.status_code < 500, (url, r.status_code)
    r = editor.post(f"/api/sites/{site_id}/rerun", headers={"Accept": "application/json"})
    assert r.status_code == 202
    assert editor.get(f"/api/sites/{site_id}/status").get_json()["run"]["status"] == "done"


def test_csrf_is_still_enforced_for_editors(guarded):
    app, site_id, _ = guarded
    editor = Visitor(app, EDITOR_SECRET)
    url = f"/api/sites/{site_id}/rerun"
    missing = editor.raw.post(url, headers={"Accept": "application/json"})
    assert missing.status_code == 403 and "form token" in missing.get_json()["error"]
    wrong = editor.raw.post(url, headers={"Accept": "application/json", "X-Sillmark-Token": "forged"})
    assert wrong.status_code == 403 and "form token" in wrong.get_json()["error"]
    signin = app.test_client().post("/signin", data={"secret": EDITOR_SECRET})  # no token: refused
    assert signin.status_code == 403


def test_a_wrong_secret_is_refused_and_each_further_try_waits_longer(tmp_path):
    app = make_app(tmp_path / "data", EDITOR_SECRET=EDITOR_SECRET, SIGNIN_DELAY=0.1, SIGNIN_MAX_DELAY=1.0)
    anon = Visitor(app)
    for k, guess in enumerate(("caddlewick", "lowbank-editor-secret-98", "x" * 24), start=1):
        r = anon.raw.post("/signin", data={"secret": guess, "csrf_token": anon.session_token()})
        assert r.status_code == 401 and "not right" in r.get_data(as_text=True)
        # The next try, even with the right secret, must wait 0.1 s times the wrong tries so far.
        time.sleep(0.1 * k - 0.06)
        soon = anon.raw.post("/signin", data={"secret": EDITOR_SECRET, "csrf_token": anon.session_token()})
        assert soon.status_code == 429 and soon.headers["Retry-After"] == "1"
        time.sleep(0.08)
    with anon.raw.session_transaction() as s:
        assert "role" not in s
    assert Visitor(app, EDITOR_SECRET).get("/api/sites").status_code == 200


def test_after_sign_in_only_a_path_on_this_server_is_followed(guarded):
    app, _, _ = guarded
    for target, expected in (("/sites/new", "/sites/new"), ("//elsewhere.example/x", "/"),
                             ("https://elsewhere.example/", "/"), ("/\\elsewhere.example", "/")):
        anon = Visitor(app)
        r = anon.raw.post("/signin", data={"secret": VIEWER_SECRET, "next": target,
                                           "csrf_token": anon.session_token()})
        assert r.status_code == 303 and r.headers["Location"] == expected, target


def test_signing_out_ends_the_session(guarded):
    app, site_id, _ = guarded
    viewer = Visitor(app, VIEWER_SECRET)
    assert viewer.get("/api/sites").status_code == 200
    assert viewer.post("/signout").status_code == 303
    assert viewer.get("/api/sites").status_code == 401


def test_loopback_without_secrets_stays_open(fresh):
    _, client = fresh
    assert client.get("/").status_code == 200
    assert client.get("/api/sites").status_code == 200
    assert client.post("/api/sites/5/rerun", headers={"Accept": "application/json"}).status_code == 404


# --------------------------------------------------------------------------- the secret key


def test_the_secret_key_differs_per_data_folder_and_survives_restarts(tmp_path):
    one = make_app(tmp_path / "one", EDITOR_SECRET=EDITOR_SECRET)
    two = make_app(tmp_path / "two", EDITOR_SECRET=EDITOR_SECRET)
    assert one.config["SECRET_KEY"] != two.config["SECRET_KEY"]
    signed_in = Visitor(one, EDITOR_SECRET)
    cookie = signed_in.raw.get_cookie("session").value
    again = make_app(tmp_path / "one", EDITOR_SECRET=EDITOR_SECRET)  # the server restarted
    assert again.config["SECRET_KEY"] == one.config["SECRET_KEY"]
    for app, status in ((again, 200), (two, 401)):
        client = app.test_client()
        client.set_cookie("session", cookie)
        assert client.get("/api/sites").status_code == status


def test_a_changed_secret_signs_out_those_who_used_the_old_one(tmp_path):
    app = make_app(tmp_path / "data", EDITOR_SECRET=EDITOR_SECRET)
    cookie = Visitor(app, EDITOR_SECRET).raw.get_cookie("session").value
    rotated = make_app(tmp_path / "data", EDITOR_SECRET="a-brand-new-editor-secret")
    client = rotated.test_client()
    client.set_cookie("session", cookie)
    assert client.get("/api/sites").status_code == 401


# --------------------------------------------------------------------------- security headers


def check_headers(response, where: str) -> None:
    h = response.headers
    csp = h.get("Content-Security-Policy", "")
    assert "default-src 'self'" in csp and "frame-ancestors 'self'" in csp, where
    assert not re.search(r"https?:|//|\*", csp), (where, csp)  # no other origin, no wildcard
    assert h.get("X-Content-Type-Options") == "nosniff", where
    assert h.get("X-Frame-Options") == "SAMEORIGIN", where
    assert h.get("Referrer-Policy") == "same-origin", where


def test_every_kind_of_response_carries_the_security_headers(guarded):
    app, site_id, run_id = guarded
    viewer = Visitor(app, VIEWER_SECRET)
    anon = Visitor(app)
    tile_url = f"/tiles/{site_id}/10.5/18/141449/92100.png?run={run_id}"
    tile = viewer.get(tile_url)
    responses = {
        "html page": viewer.get(f"/sites/{site_id}"),
        "json": viewer.get(f"/api/sites/{site_id}/stage?level=10.5"),
        "tile": tile,
        "tile 304": viewer.get(tile_url, headers={"If-None-Match": tile.headers["ETag"]}),
        "static": viewer.get("/static/css/sillmark.css"),
        "download": viewer.get(f"/api/sites/{site_id}/files/results/summary.json"),
        "json error": viewer.get("/api/sites/987654"),
        "html error": viewer.get("/sites/987654"),
        "403": viewer.post(f"/api/sites/{site_id}/rerun"),
        "401": anon.get("/api/sites"),
        "303 to sign-in": anon.get("/"),
        "sign-in page": anon.get("/signin"),
    }
    expected = {"tile": "image/png", "tile 304": None, "static": "text/css", "html page": "text/html",
                "json": "application/json", "html error": "text/html", "sign-in page": "text/html"}
    for where, r in responses.items():
        check_headers(r, where)
        if expected.get(where):
            assert r.mimetype == expected[where], where
    assert responses["tile 304"].status_code == 304
    assert responses["html error"].status_code == 404 and responses["403"].status_code == 403
    assert responses["sign-in page"].headers["Cache-Control"] == "no-store"
    wrong = anon.raw.post("/signin", data={"secret": "nope", "csrf_token": anon.session_token()},
                          environ_base={"REMOTE_ADDR": "192.0.2.7"})  # its wait binds that address only
    check_headers(wrong, "wrong sign-in")
    assert wrong.headers["Cache-Control"] == "no-store"


def test_the_session_cookie_is_http_only_and_same_site(guarded):
    app, _, _ = guarded
    client = app.test_client()
    client.get("/signin")
    r = client.post("/signin", data={"secret": EDITOR_SECRET, "csrf_token": _token(client)})
    cookie = r.headers["Set-Cookie"]
    assert "HttpOnly" in cookie and "SameSite=Lax" in cookie


def _token(client) -> str:
    with client.session_transaction() as s:
        return s["csrf"]
