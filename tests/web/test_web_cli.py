"""``sillmark serve``: its options, and the demo site registered and analysed on first start.

Reference for the demo figures: demo_dem/README.md (the asset table: the five
assets behind the Caddlewick flood bank have onset stage 47.60 m, the notch).
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from sillmark.cli import main
from tests.web_support import Client, cell_centre, lonlat, write_lowbank
from sillmark.web import config as web_config

ROOT = Path(__file__).resolve().parents[2]


def test_serve_help_lists_host_port_and_data(capsys):
    assert main(["serve", "--help"]) == 0
    out = capsys.readouterr().out
    for option in ("--host", "--port", "--data", "127.0.0.1", "8150"):
        assert option in out


@pytest.mark.parametrize("port", ["0", "70000", "http"])
def test_serve_refuses_a_bad_port(capsys, port):
    assert main(["serve", "--port", port]) == 2
    err = capsys.readouterr().err
    assert err.startswith("sillmark: error:") and "port" in err


@pytest.fixture
def small_demo(tmp_path):
    """A stand-in demo folder (the Lowbank DEM under the demo's file names)."""
    folder = tmp_path / "demo"
    folder.mkdir()
    write_lowbank(folder / "riverbend.tif")
    a, b = lonlat(*cell_centre(38, 0)), lonlat(*cell_centre(38, 10))
    (folder / "river.geojson").write_text(
        '{"type": "Feature", "properties": {}, "geometry": {"type": "LineString", '
        f'"coordinates": [[{a[0]}, {a[1]}], [{b[0]}, {b[1]}]]}}}}', encoding="utf-8")
    x, y = cell_centre(18, 25)
    (folder / "riverbend_assets.csv").write_text(f"name,kind,x,y\nSchool,school,{x},{y}\n", encoding="utf-8")
    return folder


def test_serve_starts_waitress_on_localhost_with_the_demo(monkeypatch, capsys, tmp_path, small_demo):
    import waitress

    calls = {}

    def fake_serve(app, **options):
        calls["app"] = app
        calls.update(options)

    monkeypatch.setattr(waitress, "serve", fake_serve)
    monkeypatch.setitem(web_config.DEFAULTS, "JOB_RUNNER", "inline")
    monkeypatch.setitem(web_config.DEFAULTS, "DEMO_DIR", str(small_demo))
    monkeypatch.setitem(web_config.DEFAULTS, "WARM_ZOOMS", -1)
    data = tmp_path / "data"
    assert main(["serve", "--data", str(data)]) == 0
    assert calls["host"] == "127.0.0.1" and calls["port"] == 8150
    out = capsys.readouterr().out
    assert "http://127.0.0.1:8150/" in out and str(data) in out
    client = Client(calls["app"])
    sites = client.get("/api/sites").get_json()["sites"]
    assert len(sites) == 1 and sites[0]["is_demo"] and sites[0]["state"] == "ready"
    assert [o["kind"] for o in sites[0]["outlets"]] == ["edge", "file"]
    assert sites[0]["connectivity"] == 8
    assets = client.get(f"/api/sites/{sites[0]['id']}/assets?level=10.5").get_json()
    assert [a["name"] for a in assets["assets"]] == ["School"]
    # A second start registers nothing more.
    assert main(["serve", "--data", str(data)]) == 0
    assert len(Client(calls["app"]).get("/api/sites").get_json()["sites"]) == 1


def test_serve_warns_when_listening_beyond_this_machine(monkeypatch, capsys, tmp_path):
    """With an editor secret it starts (the refusal without one: tests/web/test_web_access.py)."""
    import waitress

    monkeypatch.setattr(waitress, "serve", lambda app, **o: None)
    monkeypatch.setitem(web_config.DEFAULTS, "REGISTER_DEMO", False)
    monkeypatch.setenv("SILLMARK_EDITOR_SECRET", "invented-editor-secret-1")
    assert main(["serve", "--host", "0.0.0.0", "--port", "8151", "--data", str(tmp_path / "d")]) == 0
    captured = capsys.readouterr()
    assert "other machines can reach this server" in captured.err
    assert "Sign-in required (editors)" in captured.out


def test_the_real_demo_site_is_analysed_with_the_edge_and_the_river(tmp_path):
    """The bundled demo, as `make serve` shows it (inline here, to wait for it)."""
    from tests.web_support import make_app

    if not (ROOT / "demo_dem" / "riverbend.tif").is_file():
        pytest.skip("demo_dem/riverbend.tif is missing; run `make demo`")
    app = make_app(tmp_path / "data", REGISTER_DEMO=True)
    client = Client(app)
    site = client.get("/api/sites/1").get_json()
    assert site["name"] == "Caddlewick on the River Torvey (demo)" and site["state"] == "ready"
    assert site["summary"]["outlet_sources"] == ["edge", "river.geojson"]
    assert (site["summary"]["rows"], site["summary"]["cols"]) == (1600, 2000)
    behind_bank = {"Caddlewick Primary School", "Alder Court Care Home", "Mill Lane Substation",
                   "Carr Lane Pumping Station", "Caddlewick Health Centre"}
    for level, state in ((47.5, "shielded"), (47.6, "flooded")):
        rows = client.get(f"/api/sites/1/assets?level={level}").get_json()["assets"]
        named = {a["name"]: a for a in rows}
        for name in behind_bank:
            assert named[name]["onset_stage"] == pytest.approx(47.60, abs=1e-4), name  # README asset table
            assert named[name]["state"] == state, (name, level)
    html = client.get("/sites/1").get_data(as_text=True)
    assert "Caddlewick" in html and 'value="47.50"' in html
    shutil.rmtree(tmp_path / "data", ignore_errors=True)
