"""The printed report and the method and limitations page, without a browser.

The site is Lowbank (tests/web_support.py, invented): ground rising east from
10.00 m (z = 10 + 0.05 · col, 2 m cells), a walled basin at 9.00 m behind a
12.00 m bank with an 11.00 m notch, the DEM edge as outlet. Its assets, worked by
hand from that description:

- Basin school (row 18, col 25): ground 9.00 m in the basin. Every way in crosses
  the bank, lowest at the notch, so its onset stage and controlling sill are
  11.00 m. At 10.50 m it is shielded, 10.50 - 9.00 = 1.50 m below the level; at
  11.00 m it is flooded, 11.00 - 9.00 = 2.00 m deep.
- Hill farm (row 5, col 45): ground 10 + 0.05 · 45 = 12.25 m. Going straight north
  to the edge (rows 4..0, same column) never climbs above 12.25 m, so its own
  ground controls: onset stage 12.25 m, dry with 12.25 - 11.00 = 1.25 m to spare.
- West pump (row 38, col 2): ground 10.10 m, one cell from the south edge whose
  cell (39, 2) is also 10.10 m: onset stage 10.10 m, 11.00 - 10.10 = 0.90 m deep
  at 11.00 m.
- Far away: outside the DEM, so no figures.
"""

from __future__ import annotations

import html as html_lib
import re
from pathlib import Path

import numpy as np
import pytest

from sillmark import SCREENING_CAUTION
from sillmark.units import VerticalUnit
from sillmark.web.report import area_text, thin_route, volume_text
from tests.web_support import (
    NOTCH,
    Client,
    cell_centre,
    confirm,
    lonlat,
    make_app,
    upload_dem,
)

ROOT = Path(__file__).resolve().parents[2]


def visible_text(page: str) -> str:
    """The words a reader sees: no scripts, no tags, entities decoded, spaces collapsed."""
    page = re.sub(r"<script.*?</script>", " ", page, flags=re.S)
    page = re.sub(r"<style.*?</style>", " ", page, flags=re.S)
    page = html_lib.unescape(re.sub(r"<[^>]+>", " ", page))
    return " ".join(page.split())


def method_markdown() -> list[tuple[str, list[str]]]:
    """docs/METHOD.md as (heading, paragraphs) for each ``##`` section."""
    sections: list[tuple[str, list[str]]] = []
    for block in (ROOT / "docs" / "METHOD.md").read_text(encoding="utf-8").split("\n\n"):
        block = block.strip()
        if block.startswith("## "):
            sections.append((block[3:].strip(), []))
        elif sections and block:
            sections[-1][1].append(" ".join(block.split()))
    return sections


def get(client: Client, url: str):
    r = client.get(url)
    assert r.status_code == 200, r.get_data(as_text=True)[:400]
    return r.get_data(as_text=True)


# --------------------------------------------------------------------------- method page


def test_method_page_holds_every_section_of_docs_method_word_for_word(ready):
    _, client, _ = ready
    text = visible_text(get(client, "/method"))
    sections = method_markdown()
    # The seven subjects the page must cover, each a section of its own.
    topics = ["onset stage", "DTM against DSM", "bridges and culverts", "vertical datum",
              "Shielded low ground", "cannot tell", "licensed engineer"]
    assert len(sections) == len(topics)
    for topic, (heading, paragraphs) in zip(topics, sections):
        assert topic in heading
        assert heading in text
        assert paragraphs, heading
        for p in paragraphs:
            assert p in text, f"the page differs from docs/METHOD.md in: {p[:80]}..."
    assert SCREENING_CAUTION in text


def test_readme_links_the_method_document():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    assert "(docs/METHOD.md)" in readme


def test_every_map_page_links_to_the_method_page(ready):
    _, client, site_id = ready
    for url in (f"/sites/{site_id}", f"/sites/{site_id}/print?level=10.5"):
        page = get(client, url)
        assert re.search(r'<a [^>]*href="/method"[^>]*>Method and limitations</a>', page), url


# --------------------------------------------------------------------------- printed report


def asset_rows(page: str) -> dict[str, list[str]]:
    """The printed asset table: name -> the visible text of each cell."""
    body = page[page.index('id="print-assets"'):]
    body = body[:body.index("</table>")]
    rows = {}
    for tr in re.findall(r"<tr[^>]*>(.*?)</tr>", body, flags=re.S)[1:]:
        cells = [visible_text(c) for c in re.findall(r"<td[^>]*>(.*?)</td>", tr, flags=re.S)]
        rows[cells[0].split(" ")[0] + " " + cells[0].split(" ")[1]] = cells
    return rows


def test_printed_asset_table_gives_each_assets_state_and_depth(ready):
    _, client, site_id = ready
    at_10_5 = asset_rows(get(client, f"/sites/{site_id}/print?level=10.5"))
    at_11 = asset_rows(get(client, f"/sites/{site_id}/print?level=11.0"))
    assert set(at_11) == {"Basin school", "Hill farm", "West pump", "Far away"}
    # columns: asset, position, state, depth, ground, onset stage, controlling sill (see the module docstring)
    assert at_10_5["Basin school"][2:] == ["shielded", "1.50 m below, not reached", "9.00", "11.00", "11.00"]
    assert at_11["Basin school"][2:] == ["flooded", "2.00 m", "9.00", "11.00", "11.00"]
    assert at_11["Hill farm"][2:] == ["dry", "1.25 m to spare", "12.25", "12.25", "own ground"]
    assert at_11["West pump"][2:4] == ["flooded", "0.90 m"]
    assert at_11["Far away"][2] == "no figures"
    # Positions are coordinates in the DEM's CRS, not rows and columns: the school's cell centre.
    x, y = cell_centre(18, 25)
    assert at_11["Basin school"][1] == f"{x:,.1f} E, {y:,.1f} N"


def test_printed_report_states_datum_source_run_figures_and_caution(ready, reference):
    from sillmark.products.stage import water_level_map

    _, client, site_id = ready
    page = get(client, f"/sites/{site_id}/print?level=11.0")
    text = visible_text(page)
    assert "at 11.00 m, datum not stated" in text
    assert "Ground (m, datum not stated)" in text
    assert "Source file lowbank.tif" in text and "Uploaded 20" in text
    assert re.search(r"Run number \d+ Finished 20\d\d-\d\d-\d\d \d\d:\d\d UTC", text)
    assert "Connectivity 8 neighbours (D8)" in text
    assert "Method and its limits" in text and "Priority-Flood" in text
    assert "Site stage chart" in text and 'id="print-chart"' in page
    assert text.count(SCREENING_CAUTION) == 2  # the map page and the report page
    dem, _, result = reference
    expected = water_level_map(result, 11.0, row_areas=dem.row_areas)
    assert f"Flooded area {area_text(expected.flooded_area_m2, VerticalUnit.METRE)}" in text
    assert f"Water volume {volume_text(expected.flooded_volume_m3, VerticalUnit.METRE)}" in text
    # One asset of four is flooded at 11.00 m besides the school... the pump: two flooded, none shielded.
    assert "Assets wet 2 of 4 flooded, 0 shielded" in text


def test_printed_map_is_given_routes_sills_spill_points_and_named_assets(ready):
    """The figures the page's script draws come from the engine's routes (flood tree)."""
    import json

    _, client, site_id = ready
    page = get(client, f"/sites/{site_id}/print?level=10.5")
    config = json.loads(re.search(r'<script id="site-config" type="application/json">(.*?)</script>',
                                  page, flags=re.S).group(1))
    drawn = {a["name"]: a for a in config["draw"]["assets"]}
    assert set(drawn) == {"Basin school", "Hill farm", "West pump"}  # Far away is off the DEM
    school = drawn["Basin school"]
    assert school["state"] == "shielded" and school["sill"]["text"] == "11.00 m, datum not stated"
    assert not school["sill"]["own"] and drawn["Hill farm"]["sill"]["own"]
    # The route runs from an outlet (on the DEM edge) to the school; the sill is the notch.
    notch = lonlat(*cell_centre(*NOTCH))
    assert school["sill"]["lon"] == pytest.approx(notch[0], abs=1e-9)
    assert school["sill"]["lat"] == pytest.approx(notch[1], abs=1e-9)
    end = lonlat(*cell_centre(18, 25))
    assert school["route"][-1] == pytest.approx([end[0], end[1]], abs=1e-6)
    assert len(config["draw"]["spills"]) == 1  # the basin is the one depression
    assert config["draw"]["spills"][0]["text"] == "spill 11.00 m, datum not stated"


def test_feet_site_prints_acres_and_acre_feet(tmp_path, lowbank_tif, reference):
    """The same heights read as feet: areas in acres or ft², volumes in acre-ft, never ha or m³."""
    from sillmark.products.stage import water_level_map

    app = make_app(tmp_path / "data")
    client = Client(app)
    r = upload_dem(client, lowbank_tif)
    site_id = r.get_json()["site_id"]
    assert confirm(client, site_id, unit="ft").status_code == 202
    text = visible_text(get(client, f"/sites/{site_id}/print?level=11.0"))
    figures = text[text.index("Flooded area"):text.index("Site ")]
    assert " ha" not in figures and "m³" not in figures and "m²" not in figures
    dem, _, result = reference
    expected = water_level_map(result, 11.0, row_areas=dem.row_areas, unit=VerticalUnit.FOOT)
    assert f"Flooded area {area_text(expected.flooded_area_m2, VerticalUnit.FOOT)}" in figures
    assert "acre-ft" in figures
    assert "at 11.00 ft, datum not stated" in text


def test_area_and_volume_texts_convert_with_the_exact_acre():
    # 1 acre = 4046.8564224 m² and 1 acre-ft = 43 560 ft³ of 0.3048 m
    # (the international foot, exact by definition since 1959).
    assert area_text(4046.8564224 * 12.5, VerticalUnit.FOOT) == "12.50 acres"
    assert area_text(92.90304, VerticalUnit.FOOT) == "1,000 ft²"  # 1000 ft² of 0.3048 m
    assert volume_text(43560 * 0.3048 ** 3, VerticalUnit.US_SURVEY_FOOT) == "1.00 acre-ft"
    assert area_text(123_456.0, VerticalUnit.METRE) == "12.35 ha"


def test_thin_route_keeps_the_turns_and_the_ends():
    # A route east, east, north-east, north-east, north: the turns are at the
    # second and fourth points.
    route = np.array([[0, 0], [1, 0], [2, 0], [3, 1], [4, 2], [4, 3]], dtype=float)
    assert thin_route(route).tolist() == [[0, 0], [2, 0], [4, 2], [4, 3]]
    assert thin_route(route[:2]).tolist() == [[0, 0], [1, 0]]
