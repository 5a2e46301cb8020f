"""What the command line prints: the site, the files written, levels, assets, the what-if,
and a progress line on a terminal. Units and datums as the site has them.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import TextIO

from sillmark.cli.common import LIST_FLOODED, LIST_NEXT, LIST_SILLS


def _can_print(stream: TextIO, text: str) -> bool:
    try:
        text.encode(getattr(stream, "encoding", None) or "ascii")
    except (UnicodeEncodeError, LookupError):
        return False
    return True


_LINEAR_SYMBOL = {"metre": " m", "meter": " m", "foot": " ft", "us survey foot": " US ft"}


def _horizontal_unit(dem, stream: TextIO) -> str:
    """Symbol of the DEM's horizontal unit, as written after a cell size."""
    if dem.is_geographic:
        return "°" if _can_print(stream, "°") else " deg"
    axes = dem.horizontal_crs.axis_info
    name = axes[0].unit_name if axes else ""
    return _LINEAR_SYMBOL.get(name.lower(), f" {name}")


def _number(value: float, decimals: int = 1) -> str:
    return f"{value:,.{decimals}f}"


def _area_volume_symbols(stream: TextIO) -> tuple[str, str]:
    return ("m²", "m³") if _can_print(stream, "m²m³") else ("m2", "m3")


def _site_lines(result, dem, outlets, stream: TextIO) -> list[str]:
    """The site and its outlets, as the first lines of every command's summary."""
    from sillmark.units import VerticalUnit

    unit = VerticalUnit.parse(dem.vertical_unit)
    rows, cols = dem.shape
    dx, dy = dem.cell_size
    size_unit = _horizontal_unit(dem, stream)
    epsg = dem.crs.to_epsg()
    crs_text = f"EPSG:{epsg}" if epsg else f"CRS {dem.horizontal_crs.name!r}"
    name = Path(dem.path).name if getattr(dem, "path", None) else "DEM"
    return [
        f"Site: {name}, {rows:,} x {cols:,} cells of {dx:g}{size_unit} x {dy:g}{size_unit}, "
        f"{crs_text}, elevations in {unit.symbol}",
        f"Outlets: {', '.join(outlets.sources)} ({outlets.count:,} cells); connectivity {result.connectivity}",
    ]


def summary_lines(result, dem, outlets, out_dir: Path, files: list[Path], stream: TextIO,
                   hierarchy=None, *, significance: dict | None = None) -> list[str]:
    from sillmark import SCREENING_CAUTION
    from sillmark.units import ACRE_FOOT_M3, VerticalUnit

    m2, m3 = _area_volume_symbols(stream)
    unit = VerticalUnit.parse(dem.vertical_unit)
    t = result.depressions
    lines = _site_lines(result, dem, outlets, stream)
    if len(t):
        area_m2 = float(t.area_m2.sum())
        volume_m3 = float(t.volume_m2_vu.sum()) * unit.metres
        storage = f"{_number(volume_m3)} {m3}"
        if unit.is_feet:
            storage += f" ({_number(volume_m3 / ACRE_FOOT_M3, 2)} acre-ft)"
        k = int(t.spill_elevation.argmax())
        lines.append(
            f"Depressions: {len(t):,}, total area {_number(area_m2 / 1e4, 2)} ha "
            f"({_number(area_m2, 0)} {m2}), storage at spill {storage}"
        )
        lines.append(
            f"Highest spill elevation: {float(t.spill_elevation[k]):.2f} {unit.symbol} "
            f"(depression {int(t.id[k])})"
        )
    else:
        lines.append(f"Depressions: 0 (no ground holds water below a spill point), 0.00 ha, 0 {m3}")
    if hierarchy is not None and len(hierarchy):
        lines.append(_hierarchy_line(hierarchy))
    if significance is not None:
        lines.extend(significance_report(significance))
    if result.unreached_cells:
        lines.append(f"Cells no outlet reaches (walled in by nodata): {result.unreached_cells:,} cells")
    lines.append(f"Results: {len(files)} files in {out_dir}")
    lines.append(f"Caution: {SCREENING_CAUTION}")
    return lines


def significance_report(member: dict) -> list[str]:
    """The printed lines of a run's significance: the counts, the minimum and its source."""
    counts = member["counts"]
    depth = member["min_depth"]
    listed = ("every depression listed (--full-inventory), the significant ones marked"
              if member["full_inventory"] else "only these are listed and mapped")
    return [
        f"Significant depressions: {counts['significant']:,} ({counts['significant_top']:,} whole, "
        f"{counts['significant'] - counts['significant_top']:,} nested in those), of "
        f"{counts['all_depressions']:,} depressions and {counts['hierarchy_nodes']:,} nested "
        f"pits and pools in all; {listed}",
        f"Minimum depth: {depth['value']:.4g} {depth['unit']}, {member['source']}",
    ]


def _hierarchy_line(hierarchy) -> str:
    """Nodes, pits and nesting depth of the depression hierarchy (in memory, or the
    counts of sillmark.io.hierarchy_writer.HierarchyFiles)."""
    if hasattr(hierarchy, "depth"):
        nodes, pits, levels = hierarchy.nodes, hierarchy.pits, hierarchy.depth
    else:
        t = hierarchy.nodes
        depth = [0] * (len(t) + 1)
        for v in range(len(t), 0, -1):  # parents have higher ids than their children
            p = int(t.parent[v - 1])
            depth[v] = depth[p] + 1 if p else 1
        nodes, pits, levels = len(t), len(hierarchy.leaves), max(depth)
    return (
        f"Depression hierarchy: {nodes:,} nodes ({pits:,} pits), nested up "
        f"to {levels:,} level{'s' if levels != 1 else ''} deep"
    )


def _volume_text(volume_m3: float, unit, m3: str) -> str:
    from sillmark.units import ACRE_FOOT_M3

    text = f"{_number(volume_m3)} {m3}"
    if unit.is_feet:
        text += f" ({_number(volume_m3 / ACRE_FOOT_M3, 2)} acre-ft)"
    return text


def stage_lines(result, dem, outlets, out_dir: Path, written, notes: dict, origin: str | None,
                 stream: TextIO, *, assets=None, asset_levels=(), what_if=None,
                 what_if_path: Path | None = None) -> list[str]:
    from sillmark import SCREENING_CAUTION
    from sillmark.io.stage_files import level_text
    from sillmark.units import VerticalUnit

    m2, m3 = _area_volume_symbols(stream)
    unit = VerticalUnit.parse(dem.vertical_unit)
    sym = unit.symbol
    lines = _site_lines(result, dem, outlets, stream)
    if origin:
        lines.append(origin)
    if assets is not None:
        lines.append(_assets_line(assets, asset_levels))
    n_dep = len(result.depressions)
    extra_files = 0
    for index, level in enumerate(written.levels):
        lines.append(f"Water level {level_text(level.level)} {sym}:")
        lines.extend(f"  Note: {note}" for note in notes.get(float(level.level), ()))
        lines.append(
            f"  Flooded: {_number(level.flooded_area_m2 / 1e4, 2)} ha "
            f"({_number(level.flooded_area_m2, 0)} {m2}), volume "
            f"{_volume_text(level.flooded_volume_m3, unit, m3)}"
        )
        lines.append(
            f"  Shielded low ground: {_number(level.shielded_area_m2 / 1e4, 2)} ha "
            f"({_number(level.shielded_area_m2, 0)} {m2}), volume below the level "
            f"{_volume_text(level.shielded_volume_m3, unit, m3)}"
        )
        lines.append(
            f"  Depressions: {level.depressions_overtopped:,} overtopped, "
            f"{level.depressions_cut_off:,} cut off below the level, "
            f"{level.depressions_dry:,} dry (of {n_dep:,})"
        )
        paths = list(level.paths)
        if index < len(asset_levels):
            table, asset_paths = asset_levels[index]
            lines.extend(_asset_level_lines(table, dem, stream))
            paths.extend(asset_paths)
            extra_files += len(asset_paths)
        lines.append(f"  Files: {', '.join(p.name for p in paths)}")
    if written.table is not None:
        t = written.table
        lines.append(
            f"Stage table: {len(t):,} levels from {level_text(t.level[0])} {sym} to "
            f"{level_text(t.level[-1])} {sym} in {written.table_path.name}"
        )
    if what_if is not None:
        lines.extend(_what_if_lines(what_if, what_if_path, dem, stream))
        extra_files += 1
    lines.append(f"Results: {len(written.paths) + extra_files} files in {out_dir}")
    lines.append(f"Caution: {SCREENING_CAUTION}")
    return lines


def _xy_text(dem, x: float, y: float, stream: TextIO) -> str:
    if dem.is_geographic:
        deg = _horizontal_unit(dem, stream)
        return f"lon {x:.6f}{deg}, lat {y:.6f}{deg}"
    size_unit = _horizontal_unit(dem, stream)
    return f"x {x:.1f}{size_unit}, y {y:.1f}{size_unit}"


def _assets_line(assets, asset_levels) -> str:
    """How many assets were read and how many have no figures, once for all levels."""
    from sillmark.grid.assets import STATUS_OK

    source = assets.source
    if not asset_levels:
        return f"Assets: {len(assets):,} from {source}"
    table = asset_levels[0][0]
    missing: dict[str, int] = {}
    for status in table.status:
        if status != STATUS_OK:
            missing[status] = missing.get(status, 0) + 1
    text = f"Assets: {len(assets):,} from {source}"
    if missing:
        parts = ", ".join(f"{count:,} {status}" for status, count in missing.items())
        text += f" ({parts}: no figures)"
    return text


def _asset_level_lines(table, dem, stream: TextIO) -> list[str]:
    """Counts of flooded, shielded and dry assets at one level, the flooded ones
    with their depth, and the next to flood with their onset stage and sill."""
    import numpy as np

    from sillmark.io.stage_files import level_text
    from sillmark.products.assets import STATE_DRY, STATE_FLOODED, STATE_SHIELDED

    sym = table.unit.symbol
    state = table.state
    flooded = [k for k in range(len(table)) if state[k] == STATE_FLOODED]
    shielded = sum(1 for v in state if v == STATE_SHIELDED)
    dry = sum(1 for v in state if v == STATE_DRY)
    none = len(table) - len(flooded) - shielded - dry
    text = f"  Assets: {len(flooded):,} flooded, {shielded:,} shielded, {dry:,} dry"
    if none:
        text += f", {none:,} without figures"
    lines = [text + f" (of {len(table):,})"]
    for k in flooded[:LIST_FLOODED]:
        lines.append(f"    flooded: {_asset_name(table, k)}: depth {float(table.depth[k]):.2f} {sym} "
                     f"(ground {level_text(table.ground_elevation[k])} {sym})")
    if len(flooded) > LIST_FLOODED:
        lines.append(f"    ... and {len(flooded) - LIST_FLOODED:,} more flooded (see the assets file)")
    waiting = [k for k in range(len(table)) if state[k] in (STATE_SHIELDED, STATE_DRY)]
    waiting.sort(key=lambda k: (float(table.onset_stage[k]), k))
    for k in waiting[:LIST_NEXT]:
        sill = table.sill(k)
        if bool(table.sill_is_own_cell[k]):
            where = "no sill, its own ground controls"
        else:
            where = (f"controlling sill {level_text(sill.elevation)} {sym} at row {sill.row}, "
                     f"col {sill.col} ({_xy_text(dem, sill.x, sill.y, stream)})")
        freeboard = float(np.float32(table.onset_stage[k]) - np.float32(table.level))
        lines.append(
            f"    next to flood: {_asset_name(table, k, state[k])}: onset stage "
            f"{level_text(table.onset_stage[k])} {sym}, freeboard {freeboard:.2f} {sym}; {where}"
        )
    return lines


def _asset_name(table, k: int, state: str = "") -> str:
    notes = ", ".join(text for text in (table.kind[k], state) if text)
    return f"{table.name[k]} ({notes})" if notes else table.name[k]


def _what_if_lines(run, path: Path | None, dem, stream: TextIO) -> list[str]:
    from sillmark.grid.crs import horizontal_unit_suffix
    from sillmark.io.stage_files import level_text
    from sillmark.units import VerticalUnit, unit_suffix

    unit = VerticalUnit.parse(dem.vertical_unit)
    sym = unit.symbol
    v = unit_suffix(unit)
    h = horizontal_unit_suffix(dem)
    name = path.name if path is not None else "the what-if file"
    height = run.rows[0][f"height_{v}"] if run.rows else None
    head = "What if each controlling sill were higher" if height is None else (
        f"What if each controlling sill were {level_text(height)} {sym} higher")
    lines = [f"{head} ({name}):"]
    passed = []
    if run.own:
        passed.append(f"{run.own:,} whose own ground controls")
    if run.no_figures:
        passed.append(f"{run.no_figures:,} without figures")
    tail = f"; passed over: {', '.join(passed)}" if passed else ""
    if not run.rows:
        lines.append(f"  No asset stands behind a sill: nothing to raise{tail}")
        return lines
    n_rows, n_sills = len(run.rows), len(run.sills)
    lines.append(f"  {n_rows:,} asset{'s' if n_rows != 1 else ''} behind {n_sills:,} distinct "
                 f"sill{'s' if n_sills != 1 else ''} ({n_sills:,} recompute{'s' if n_sills != 1 else ''})"
                 f"{tail}")
    for members in run.sills[:LIST_SILLS]:
        first = members[0]
        before = first[f"onset_before_{v}"]
        after = [m[f"onset_after_{v}"] for m in members]
        gains = [m[f"gain_{v}"] for m in members]
        lo, hi = min(after), max(after)
        after_text = f"{level_text(lo)} {sym}" if lo == hi else f"{level_text(lo)} to {level_text(hi)} {sym}"
        gain_text = (f"{min(gains):.2f} {sym}" if min(gains) == max(gains)
                     else f"{min(gains):.2f} to {max(gains):.2f} {sym}")
        xy = _xy_text(dem, first[f"sill_before_x_{h}"], first[f"sill_before_y_{h}"], stream)
        lines.append(
            f"  sill at row {first['sill_before_row']}, col {first['sill_before_col']} ({xy}) "
            f"({first['raised_cells']:,} crest cell{'s' if first['raised_cells'] != 1 else ''}) "
            f"raised from {level_text(first[f'sill_before_elevation_{v}'])} to "
            f"{level_text(first[f'raised_elevation_{v}'])} {sym}: {len(members):,} "
            f"asset{'s' if len(members) != 1 else ''}, onset stage {level_text(before)} -> "
            f"{after_text} (gain {gain_text})"
        )
        if all(m["raised_cell_controls"] for m in members):
            lines.append("    the raised cell still controls")
        else:
            moved = next(m for m in members if not m["raised_cell_controls"])
            there = (f"row {moved['sill_after_row']}, col {moved['sill_after_col']} "
                     f"({_xy_text(dem, moved[f'sill_after_x_{h}'], moved[f'sill_after_y_{h}'], stream)})")
            if max(gains) == 0:
                lines.append(
                    f"    no gain: another way in at the same elevation remains, over {there} at "
                    f"{level_text(moved[f'sill_after_elevation_{v}'])} {sym}"
                )
            else:
                lines.append(
                    f"    then water comes over the sill at {there} at "
                    f"{level_text(moved[f'sill_after_elevation_{v}'])} {sym}"
                )
    if len(run.sills) > LIST_SILLS:
        lines.append(f"  ... and {len(run.sills) - LIST_SILLS:,} more sills (see {name})")
    return lines


class Progress:
    """Phase bar plus a per-file bar on stderr; does nothing when disabled."""

    PHASES = ("read", "outlets", "flood", "export")

    def __init__(self, enabled: bool, phases: tuple[str, ...] | None = None) -> None:
        self.enabled = enabled
        self._phase = None
        self._file = None
        if enabled:
            from tqdm import tqdm

            self._tqdm = tqdm
            total = len(self.PHASES if phases is None else phases)
            self._phase = tqdm(total=total, desc="sillmark", unit="phase", file=sys.stderr,
                               leave=False, bar_format="{desc}: {n_fmt}/{total_fmt} {bar} {elapsed}")

    def start(self, phase: str) -> None:
        if self._phase is not None:
            self._phase.set_description_str(f"sillmark: {phase}")

    def done(self) -> None:
        if self._phase is not None:
            self._phase.update(1)

    def file(self, name: str, done: int, total: int) -> None:
        if not self.enabled:
            return
        if self._file is None:
            self._file = self._tqdm(total=total, desc=name, unit="block", file=sys.stderr, leave=False, position=1)
        bar = self._file
        if bar.desc != name or bar.total != total:
            bar.reset(total=total)
            bar.set_description_str(name)
        bar.n = done
        bar.refresh()

    def close(self) -> None:
        for bar in (self._file, self._phase):
            if bar is not None:
                bar.close()
