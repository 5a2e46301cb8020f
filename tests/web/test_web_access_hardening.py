"""Sign-in and sessions under abuse: control characters in redirect targets,
server-side sessions that sign-out revokes, no shared caching of private
answers, and wrong guesses refused early without holding a request thread.

The secrets below are invented for these tests.
"""

from __future__ import annotations

import pytest

from tests.web.test_web_access import EDITOR_SECRET, VIEWER_SECRET, Visitor
from tests.web_support import analysed_site, make_app, write_lowbank


@pytest.fixture(scope="module")
def guarded(tmp_path_factory):
    """(app, site_id): an app with both secrets and one analysed site."""
    folder = tmp_path_factory.mktemp("access_hardening")
    app = make_app(folder / "data", EDITOR_SECRET=EDITOR_SECRET, VIEWER_SECRET=VIEWER_SECRET)
    editor = Visitor(app, EDITOR_SECRET)
    site_id = analysed_site(editor, write_lowbank(folder / "lowbank.tif"))
    return app, site_id


# --------------------------------------------------------------------------- redirect targets


@pytest.mark.parametrize("target", ["/sites/new\r\nSet-Cookie: role=editor", "/\x00", "/sites\x7f",
                                    "/\tx", "/%0d%0aX: y\n"])
def test_control_characters_in_the_sign_in_target_lead_home(guarded, target):
    app, _ = guarded
    anon = Visitor(app)
    page = anon.get("/signin", query_string={"next": target})
    assert page.status_code == 200
    r = anon.raw.post("/signin", data={"secret": VIEWER_SECRET, "next": target,
                                       "csrf_token": anon.session_token()})
    assert r.status_code == 303 and r.headers["Location"] == "/", r.get_data(as_text=True)[:200]
    assert "Set-Cookie: role" not in str(r.headers)


# --------------------------------------------------------------------------- caching


def test_behind_secrets_no_answer_may_be_kept_by_a_shared_cache(guarded):
    app, site_id = guarded
    viewer = Visitor(app, VIEWER_SECRET)
    run_id = viewer.get(f"/api/sites/{site_id}").get_json()["current_run"]
    answers = {
        "tile": viewer.get(f"/tiles/{site_id}/hillshade/18/141449/92100.png?run={run_id}"),
        "json": viewer.get(f"/api/sites/{site_id}/stage?level=10.5"),
        "site list": viewer.get("/api/sites"),
        "page": viewer.get(f"/sites/{site_id}"),
        "download": viewer.get(f"/api/sites/{site_id}/files/results/summary.json"),
        "level file": viewer.get(f"/api/sites/{site_id}/files/level/10.5/depth"),
    }
    for what, r in answers.items():
        assert r.status_code == 200, what
        policy = [p.strip() for p in r.headers.get("Cache-Control", "").split(",")]
        assert "private" in policy or "no-store" in policy, (what, policy)
        assert "public" not in policy, (what, policy)
        assert "Cookie" in r.headers.get("Vary", ""), what
    assert "max-age=" in answers["tile"].headers["Cache-Control"]  # the browser itself may keep tiles
    for r in (viewer.get("/signin"), Visitor(app).raw.post("/signin", data={"secret": "wrong guess here"})):
        assert r.headers["Cache-Control"] == "no-store"


def test_without_secrets_tiles_stay_publicly_cacheable(ready):
    app, client, site_id = ready
    run_id = client.get(f"/api/sites/{site_id}").get_json()["current_run"]
    r = client.get(f"/tiles/{site_id}/hillshade/18/141449/92100.png?run={run_id}")
    assert r.status_code == 200 and r.headers["Cache-Control"].startswith("public")


# --------------------------------------------------------------------------- sessions on the server


def copied_cookie(visitor) -> str:
    cookie = visitor.raw.get_cookie("session")
    assert cookie is not None
    return cookie.value


def client_with_cookie(app, value: str):
    other = app.test_client()
    other.set_cookie("session", value)
    return other


def test_signing_out_revokes_every_copy_of_the_session_cookie(guarded):
    app, site_id = guarded
    viewer = Visitor(app, VIEWER_SECRET)
    stolen = copied_cookie(viewer)
    thief = client_with_cookie(app, stolen)
    assert thief.get("/api/sites").status_code == 200  # the copy works while the sign-in lasts
    assert viewer.post("/signout").status_code == 303
    assert thief.get("/api/sites").status_code == 401
    assert client_with_cookie(app, stolen).get(f"/api/sites/{site_id}").status_code == 401


def test_a_sign_in_older_than_its_lifetime_is_refused_even_with_a_valid_cookie(guarded):
    import sqlite3

    app, _ = guarded
    viewer = Visitor(app, VIEWER_SECRET)
    assert viewer.get("/api/sites").status_code == 200
    conn = sqlite3.connect(app.extensions["sillmark"].db_path)
    try:
        with conn:
            conn.execute("UPDATE signins SET created = created - ?", (app.config["SIGNIN_LIFETIME"] + 60,))
    finally:
        conn.close()
    assert viewer.get("/api/sites").status_code == 401


def test_a_changed_secret_ends_the_sessions_granted_with_the_old_one(tmp_path):
    data = tmp_path / "data"
    before = make_app(data, EDITOR_SECRET=EDITOR_SECRET)
    editor = Visitor(before, EDITOR_SECRET)
    cookie = copied_cookie(editor)
    assert client_with_cookie(before, cookie).get("/api/sites").status_code == 200
    after = make_app(data, EDITOR_SECRET=EDITOR_SECRET + "-changed")
    assert client_with_cookie(after, cookie).get("/api/sites").status_code == 401


# --------------------------------------------------------------------------- guessing


def test_a_burst_of_wrong_guesses_is_refused_early_and_holds_no_thread(tmp_path):
    import threading
    import time

    app = make_app(tmp_path / "data", EDITOR_SECRET=EDITOR_SECRET, SIGNIN_DELAY=3.0, SIGNIN_MAX_DELAY=30.0)
    anon = Visitor(app)
    token = anon.session_token()
    first = anon.raw.post("/signin", data={"secret": "wrong-guess-0000", "csrf_token": token})
    assert first.status_code == 401
    statuses, started = [], time.monotonic()

    def guess(k: int) -> None:
        r = anon.raw.post("/signin", data={"secret": f"wrong-guess-{k:04d}", "csrf_token": token},
                          headers={"Accept": "application/json"})
        statuses.append((r.status_code, r.headers.get("Retry-After"), r.get_json()))

    threads = [threading.Thread(target=guess, args=(k,)) for k in range(1, 25)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(10)
    assert time.monotonic() - started < 2.0  # nobody slept for the 3 s wait
    assert {s for s, _, _ in statuses} == {429}
    assert all(int(after) in (2, 3) for _, after, _ in statuses)
    assert all("wait" in body["error"] and body["status"] == 429 for _, _, body in statuses)
    # Someone else, from the same machine here, already signed in is not held up.
    t0 = time.monotonic()
    assert Visitor(app).get("/signin").status_code == 200
    assert time.monotonic() - t0 < 1.0
