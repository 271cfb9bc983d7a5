"""Figures of a run and the self-contained HTML report (figures embedded)."""

from __future__ import annotations

import base64
import html
from pathlib import Path

from .system import SPECIES

__all__ = ["write_figures_and_report", "CAUTION"]

CAUTION = (
    "These results are model projections for comparing options, not predictions of real "
    "populations. Confirm any decision with field data, and with the assessment and the "
    "qualified practitioners that local rules require."
)

#: (column, title, legend label, kind) for each per-patch map.
MAPS = [
    ("{s}_persists", "{S}: present at the end of the run", "present at the end", "categorical"),
    ("{s}_occupancy", "{S}: occupancy after burn-in", "share of census steps occupied", "sequential"),
    ("{s}_sync_local", "{S}: synchrony with linked patches",
     "link-weighted mean correlation of log(1 + abundance)", "diverging"),
]


def _pick_panel_patches(result, k=6):
    """A few patches worth plotting: the largest, the smallest and some in between."""
    order = result.patches["area_km2"].sort_values(ascending=False).index
    if len(order) <= k:
        return list(order)
    step = (len(order) - 1) / (k - 1)
    return [order[round(i * step)] for i in range(k)]


def write_figures_and_report(folder, result, gdf, links, summary) -> None:
    """Draw the maps and panels into ``folder/maps`` and write ``folder/report.html``."""
    from . import plot

    folder = Path(folder)
    maps = folder / "maps"
    maps.mkdir(exist_ok=True)
    sc = result.study.scenario
    figures = []
    for s in SPECIES:
        for column, title, label, kind in MAPS:
            col = column.format(s=s)
            path = maps / f"{col}.png"
            plot.patch_map(gdf, col, path=path, links=links,
                           title=title.format(S=s.capitalize()), label=label,
                           diverging=kind == "diverging", categorical=kind == "categorical")
            figures.append((title.format(S=s.capitalize()), path))
    panels = maps / "timeseries.png"
    plot.timeseries_panels(result.trajectory.data, _pick_panel_patches(result), path=panels,
                           time_unit=sc["time_unit"], burn_in=sc["run.burn_in"])
    figures.append(("Abundance over time in six patches (largest to smallest)", panels))
    occupancy = maps / "occupancy.png"
    plot.occupancy_curve(result.trajectory.data, path=occupancy, time_unit=sc["time_unit"])
    figures.append(("Share of patches occupied over time", occupancy))
    (folder / "report.html").write_text(_html(result, summary, figures), encoding="utf-8")


def _img(path: Path) -> str:
    data = base64.b64encode(path.read_bytes()).decode("ascii")
    return f'<img alt="{html.escape(path.stem)}" src="data:image/png;base64,{data}">'


def _html(result, summary, figures) -> str:
    sc = result.study.scenario
    esc = html.escape
    rows = [
        ("patches", summary["patches"]), ("links", summary["links"]),
        ("connected groups of patches", summary["components"]),
        ("isolated patches", summary["isolated_patches"]),
    ]
    for s in SPECIES:
        rows.append((f"{s}: share of patches where it persists",
                     f"{summary[f'{s}_regional_persistence']:.1%}"))
        sync = summary[f"{s}_synchrony"]
        rows.append((f"{s}: mean pairwise synchrony", "n/a" if sync != sync else f"{sync:.2f}"))
    solver = summary["solver"]
    rows.append(("solver", f"{solver['method']}, {solver['nfev']} right-hand-side evaluations"))
    table = "\n".join(f"<tr><th>{esc(str(k))}</th><td>{esc(str(v))}</td></tr>" for k, v in rows)
    figs = "\n".join(f"<figure>{_img(p)}<figcaption>{esc(t)}</figcaption></figure>"
                     for t, p in figures)
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>{esc(sc.name)} — trophoscape report</title>
<style>
body {{ font-family: sans-serif; max-width: 1100px; margin: 2em auto; color: #222; }}
.caution {{ border-left: 4px solid #b35806; background: #fdf3e7; padding: .6em 1em; }}
table {{ border-collapse: collapse; }} th, td {{ text-align: left; padding: .2em .8em; }}
th {{ font-weight: normal; color: #555; }}
figure {{ display: inline-block; margin: .5em; max-width: 520px; vertical-align: top; }}
figure img {{ max-width: 100%; }} figcaption {{ font-size: .9em; color: #444; }}
</style></head><body>
<h1>{esc(sc.name)}</h1>
<p class="caution"><strong>Caution.</strong> {esc(CAUTION)}</p>
<h2>Headline results</h2>
<table>{table}</table>
<h2>Maps and figures</h2>
{figs}
<p><small>Run {esc(summary['provenance']['created'])} with trophoscape
{esc(summary['provenance']['version'])}; scenario sha256
{esc(summary['provenance']['scenario_sha256'][:12])}…</small></p>
</body></html>
"""
