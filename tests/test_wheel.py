"""A wheel built from the checkout works on its own, away from the checkout.

The wheel is built and installed into a new virtual environment in a
temporary folder; the test then runs from a folder outside the checkout, so
nothing can come from the source tree: ``sillmark analyse`` writes its results,
and ``sillmark serve`` answers its pages, scripts, styles and the vendored map
library from the installed package data. The third-party dependencies are
borrowed from the test's own environment (a path entry, not an install) so the
test needs no network.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import sysconfig
import urllib.request
from pathlib import Path

import pytest

from tests.servers import serving
from tests.web_support import write_lowbank

ROOT = Path(__file__).resolve().parents[1]

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def installed(tmp_path_factory) -> Path:
    """The ``bin`` folder of a new environment holding only the wheel of this checkout."""
    work = tmp_path_factory.mktemp("wheel")
    # Build from a copy of the files git knows (tracked, or new and not ignored), so that
    # nothing left in the checkout (a build/ folder, caches) can slip into the wheel.
    source = work / "source"
    listed = subprocess.run(["git", "ls-files", "-co", "--exclude-standard"], cwd=ROOT, check=True,
                            capture_output=True, text=True).stdout.splitlines()
    for name in listed:
        if (ROOT / name).is_file():
            (source / name).parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(ROOT / name, source / name)
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation",
                    "--quiet", "-w", str(work / "dist"), str(source)], check=True, timeout=600,
                   cwd=work)
    (wheel,) = (work / "dist").glob("sillmark-*.whl")
    env_dir = work / "env"
    subprocess.run([sys.executable, "-m", "venv", str(env_dir)], check=True, timeout=300)
    py = env_dir / "bin" / "python"
    site = subprocess.run([str(py), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                          check=True, capture_output=True, text=True).stdout.strip()
    # Dependencies from this environment, appended after the new one's own site-packages.
    (Path(site) / "borrowed_dependencies.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    subprocess.run([str(py), "-m", "pip", "install", "--no-deps", "--no-index", "--quiet", str(wheel)],
                   check=True, timeout=600, cwd=work)
    return env_dir / "bin"


def _outside(tmp_path: Path) -> dict:
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VIRTUAL_ENV")}
    env["PYTHONNOUSERSITE"] = "1"
    # The kernels run as plain Python: this test is about what the wheel holds, and
    # compiling every kernel afresh for the new environment would take minutes.
    env["NUMBA_DISABLE_JIT"] = "1"
    return env


def test_the_installed_package_comes_from_the_wheel(installed, tmp_path):
    where = subprocess.run([str(installed / "python"), "-c", "import sillmark, sillmark.web; "
                            "print(sillmark.__file__); print(sillmark.web.__file__)"],
                           cwd=tmp_path, env=_outside(tmp_path), capture_output=True, text=True,
                           check=True).stdout.split()
    for path in where:
        assert Path(path).is_relative_to(installed.parent), path
        assert not Path(path).is_relative_to(ROOT), path


def test_the_installed_command_analyses_a_dem(installed, tmp_path):
    dem = write_lowbank(tmp_path / "lowbank.tif")
    out = tmp_path / "results"
    done = subprocess.run([str(installed / "sillmark"), "analyse", str(dem), "--out", str(out)],
                          cwd=tmp_path, env=_outside(tmp_path), capture_output=True, text=True,
                          timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    summary = json.loads((out / "summary.json").read_text())
    # The walled basin of the Lowbank site (tests/web_support.py), worked by hand: 16 x 21 cells
    # of 2 m x 2 m at 9.00 m, filled to the 11.00 m notch: 336 x 4 m2 = 1344 m2 and 2688 m3.
    assert summary["depressions"]["count"] == 1
    assert summary["depressions"]["total_area_m2"] == 1344.0
    assert summary["depressions"]["total_volume_m3"] == 2688.0
    assert (out / "onset_stage.tif").stat().st_size > 0


def _get(url: str) -> tuple[int, str, bytes]:
    with urllib.request.urlopen(url, timeout=30) as r:
        return r.status, r.headers.get("Content-Type", ""), r.read()


def test_the_installed_server_serves_its_pages_and_static_files(installed, tmp_path):
    with serving(tmp_path / "data", command=[str(installed / "sillmark")], cwd=tmp_path,
                 env=_outside(tmp_path)) as base:
        status, kind, body = _get(f"{base}/")
        assert status == 200 and kind.startswith("text/html")
        assert b"Sillmark" in body and b"screening analysis" in body.lower()
        status, kind, body = _get(f"{base}/sites/new")
        assert status == 200 and b"<form" in body
        for path, expected in [("/static/css/sillmark.css", "text/css"),
                               ("/static/js/site.js", "javascript"),
                               ("/static/vendor/leaflet/leaflet.js", "javascript")]:
            status, kind, body = _get(f"{base}{path}")
            assert status == 200 and expected in kind and len(body) > 500, path
