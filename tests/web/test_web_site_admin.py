"""The Files tab read from the results folder, renaming and deleting sites, and the
sign-in page of a server without secrets. The secrets below are invented for these tests."""

from __future__ import annotations

import json
import re

import pytest

from sillmark.web import layout
from tests.web_support import Client, analysed_site, make_app, upload_dem, write_lowbank

EDITOR_SECRET = "admin-editor-secret-63"
VIEWER_SECRET = "admin-viewer-secret-28"
JSON = {"Accept": "application/json"}


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    """(app, client, site_id, results folder, data folder) of one analysed Lowbank site."""
    folder = tmp_path_factory.mktemp("admin")
    data = folder / "data"
    app = make_app(data)
    client = Client(app)
    site_id = analysed_site(client, write_lowbank(folder / "lowbank.tif"), assets=False)
    run_id = client.get(f"/api/sites/{site_id}").get_json()["current_run"]
    return app, client, site_id, layout.results_dir(data, site_id, run_id), data


def test_the_files_tab_lists_what_the_results_folder_holds(site):
    _, client, site_id, results, _ = site
    on_disk = sorted(p.name for p in results.iterdir() if not p.name.startswith("."))
    listed = [f["name"] for f in client.get(f"/api/sites/{site_id}/files").get_json()["files"]]
    assert sorted(listed) == on_disk
    for name in ("depression_hierarchy.csv", "depression_hierarchy.json", "depression_curves.csv",
                 "onset_stage.sld", "spill_points.sld", "summary.json"):
        assert name in listed
    page = client.get(f"/sites/{site_id}").get_data(as_text=True)
    tab = page[page.index('id="run-files"'):]
    tab = tab[:tab.index("</ul>")]
    assert sorted(re.findall(r'download>([^<]+)</a>', tab)) == sorted(on_disk + ["stage_table.csv"])
    for name in on_disk:  # each one downloads, byte for byte
        r = client.get(f"/api/sites/{site_id}/files/run/{name}")
        assert r.status_code == 200 and r.get_data() == (results / name).read_bytes(), name


def test_a_file_added_to_the_folder_is_listed_and_other_names_are_refused(site):
    _, client, site_id, results, _ = site
    (results / "README.txt").write_text("what each file is\n", encoding="utf-8")
    try:
        listed = [f["name"] for f in client.get(f"/api/sites/{site_id}/files").get_json()["files"]]
        assert "README.txt" in listed
    finally:
        (results / "README.txt").unlink()
    for name in ("README.txt", "..%2Fworker.log", ".hidden", "nothing.tif"):
        r = client.get(f"/api/sites/{site_id}/files/run/{name}", headers=JSON)
        assert r.status_code == 404, name


def test_summary_json_holds_no_server_path(site):
    _, client, site_id, _, data = site
    text = client.get(f"/api/sites/{site_id}/files/run/summary.json").get_data(as_text=True)
    assert str(data) not in text and str(data.resolve()) not in text

    def strings(v):
        if isinstance(v, str):
            yield v
        elif isinstance(v, dict):
            for x in v.values():
                yield from strings(x)
        elif isinstance(v, list):
            for x in v:
                yield from strings(x)

    values = list(strings(json.loads(text)))
    assert values and not [s for s in values if s.startswith("/")]


# --------------------------------------------------------------------------- rename


def test_rename_and_a_duplicate_name_is_flagged(tmp_path):
    app = make_app(tmp_path / "data")
    client = Client(app)
    dem = write_lowbank(tmp_path / "lowbank.tif")
    first = upload_dem(client, dem, name="Mill Lane.tif").get_json()["site_id"]
    second = upload_dem(client, dem, name="Mill Lane.tif").get_json()["site_id"]
    index = client.get("/").get_data(as_text=True)
    assert index.count("same name as another site") == 2  # the upload gave both the same name

    r = client.post(f"/sites/{second}/rename", json={"name": "  Ferry   Row "}, headers=JSON)
    assert r.status_code == 200 and r.get_json()["name"] == "Ferry Row"
    assert "same name as another site" not in client.get("/").get_data(as_text=True)

    r = client.post(f"/sites/{first}/rename", json={"name": "ferry row"}, headers=JSON)
    assert r.status_code == 409 and r.get_json()["duplicate_of"] == [second]
    assert "already called" in r.get_json()["error"]
    assert client.get(f"/api/sites/{first}").get_json()["name"] == "Mill Lane"  # unchanged

    r = client.post(f"/sites/{first}/rename", data={"name": "FERRY ROW"})  # the page's form
    assert r.status_code == 409 and "already called" in r.get_data(as_text=True)
    r = client.post(f"/sites/{first}/rename", json={"name": "  \t "}, headers=JSON)
    assert r.status_code == 400
    r = client.post(f"/sites/{first}/rename", data={"name": "Mill Lane north"})
    assert r.status_code == 303
    assert client.get(f"/api/sites/{first}").get_json()["name"] == "Mill Lane north"


# --------------------------------------------------------------------------- delete


def test_delete_needs_the_name_typed_and_removes_every_file(tmp_path):
    data = tmp_path / "data"
    app = make_app(data)
    client = Client(app)
    dem = write_lowbank(tmp_path / "lowbank.tif")
    keep = upload_dem(client, dem, name="keep.tif").get_json()["site_id"]
    gone = analysed_site(client, dem)
    name = client.get(f"/api/sites/{gone}").get_json()["name"]
    folder = layout.site_dir(data, gone)
    assert (folder / "runs").is_dir()
    client.get(f"/api/sites/{gone}/files/level/10.5.zip")  # an export in the cache too

    page = client.get(f"/sites/{gone}/manage").get_data(as_text=True)
    assert 'id="delete-confirm"' in page and name in page
    for typed in ("", name.upper(), name + "x", "keep"):
        r = client.post(f"/sites/{gone}/delete", data={"confirm_name": typed})
        assert r.status_code == 400 and "nothing was deleted" in r.get_data(as_text=True)
    assert folder.is_dir() and client.get(f"/api/sites/{gone}").status_code == 200

    r = client.post(f"/sites/{gone}/delete", json={"confirm_name": name}, headers=JSON)
    assert r.status_code == 200 and r.get_json() == {"deleted": gone}
    assert not folder.exists()
    assert not [p for p in (data / "sites").iterdir() if p.name.startswith(".deleted")]
    assert client.get(f"/api/sites/{gone}", headers=JSON).status_code == 404
    assert client.get(f"/sites/{gone}/manage").status_code == 404
    assert [s["id"] for s in client.get("/api/sites").get_json()["sites"]] == [keep]
    assert app.extensions["sillmark"].exports.bytes_used == 0
    assert layout.site_dir(data, keep).is_dir()  # the other site is untouched


# --------------------------------------------------------------------------- who may


class Visitor(Client):
    def __init__(self, app, secret: str) -> None:
        self.app = app
        self.raw = app.test_client()
        self.raw.get("/signin")
        with self.raw.session_transaction() as s:
            token = s["csrf"]
        r = self.raw.post("/signin", data={"secret": secret, "next": "/", "csrf_token": token})
        assert r.status_code == 303
        self.raw.get("/")
        with self.raw.session_transaction() as s:
            self.token = s["csrf"]


def test_viewers_may_neither_rename_nor_delete(tmp_path):
    app = make_app(tmp_path / "data", EDITOR_SECRET=EDITOR_SECRET, VIEWER_SECRET=VIEWER_SECRET,
                   SIGNIN_DELAY=0.01)
    editor, viewer = Visitor(app, EDITOR_SECRET), Visitor(app, VIEWER_SECRET)
    site_id = upload_dem(editor, write_lowbank(tmp_path / "lowbank.tif")).get_json()["site_id"]
    name = editor.get(f"/api/sites/{site_id}").get_json()["name"]
    page = viewer.get(f"/sites/{site_id}/manage").get_data(as_text=True)
    assert 'id="viewer-note"' in page and 'id="delete-form"' not in page
    assert viewer.post(f"/sites/{site_id}/rename", json={"name": "Other"}, headers=JSON).status_code == 403
    assert viewer.post(f"/sites/{site_id}/delete", json={"confirm_name": name},
                       headers=JSON).status_code == 403
    assert editor.get(f"/api/sites/{site_id}").get_json()["name"] == name
    assert 'id="delete-form"' in editor.get(f"/sites/{site_id}/manage").get_data(as_text=True)
    assert editor.post(f"/sites/{site_id}/rename", json={"name": "Other"}, headers=JSON).status_code == 200


# --------------------------------------------------------------------------- sign-in page


def test_signin_page_without_secrets_says_none_is_needed(tmp_path):
    open_app = make_app(tmp_path / "open")
    page = Client(open_app).get("/signin").get_data(as_text=True)
    assert "No sign-in is needed here" in page
    assert 'type="password"' not in page and "Access secret" not in page

    guarded = make_app(tmp_path / "guarded", EDITOR_SECRET=EDITOR_SECRET)
    page = guarded.test_client().get("/signin").get_data(as_text=True)
    assert 'type="password"' in page and "No sign-in is needed" not in page
