"""Lookups the views share: a site's row, its open results, its active assets.

Each aborts the request with a clear message when the thing asked for does not
exist (404) or is not ready yet (409), through the SillmarkError handlers.
"""

from __future__ import annotations

from sillmark.web import get_db, layout, services
from sillmark.web.site_data import SiteData
from sillmark.web.sites import SiteNotReady


def site_row(site_id: int):
    """The site's database row; UnknownSite (404) if there is none."""
    return services().registry.site(get_db(), site_id)


def open_site(site_id: int) -> tuple[object, SiteData]:
    """The site's row and its current results, open in this process."""
    row = site_row(site_id)
    if not row["current_run"]:
        raise SiteNotReady(
            f"site {site_id} has no finished analysis yet; its page shows the progress"
        )
    return row, services().cache.get(site_id, row["current_run"])


def site_assets(site_id: int, data: SiteData):
    """(key, Assets) of the site's active asset set, or (None, None) when it has none."""
    svc = services()
    row = svc.registry.active_assets(get_db(), site_id)
    if row is None:
        return None, None
    path = layout.site_dir(svc.data_dir, site_id) / row["file_name"]
    key = ("assets", int(row["id"]))
    return key, data.assets(key, path)
