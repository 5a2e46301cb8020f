"""Sign-in and sessions under abuse: control characters in redirect targets,
server-side sessions that sign-out revokes, no shared caching of private
answers, and wrong guesses refused early without holding a request thread.

The secrets below are invented for these tests.
"""

from __future__ import annotations

import pytest

from tests.test_web_access import EDITOR_SECRET, VIEWER_SECRET, Visitor
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
