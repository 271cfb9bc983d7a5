"""Figures of a run and the self-contained HTML report (figures embedded as data URIs).

The report opens with the scenario in plain words and the caution, then the headline
figures, then one section per analysis; every figure carries one sentence on how to read it.
Figures whose columns a run did not produce are left out.
"""

from __future__ import annotations

import base64
import html
import math
from dataclasses import dataclass
from pathlib import Path

from .system import SPECIES

__all__ = ["write_figures_and_report", "add_section", "CAUTION"]

CAUTION = (
    "These results are model projections for comparing options, not predictions of real "
    "populations. Confirm any decision with field data, and with the assessment and the "
    "qualified practitioners that local rules require."
)


@dataclass(frozen=True)
class MapSpec:
    """One per-patch map: column pattern, title, legend label, colouring, how to read it."""

    column: str
    title: str
    label: str
    kind: str  # "sequential" | "diverging" | "categorical"
    read: str
    missing: object = None  # a value that means "no value" (drawn grey)


SECTIONS = {
    "Persistence": [
        MapSpec("{s}_persists", "{S}: present at the end of the run", "at the end",
                "categorical", "Patches where the {s} was still present when the run ended."),
        MapSpec("{s}_occupancy", "{S}: occupancy after burn-in", "share of census steps occupied",
                "sequential", "1 means the {s} was present at every census after burn-in; "
                "low values mark patches it keeps losing."),
        MapSpec("{s}_persistence_share", "{S}: share of replicates keeping it",
                "share of replicates", "sequential",
                "Across the replicate runs, how often the patch still held the {s} at the end."),
    ],
    "Synchrony": [
        MapSpec("{s}_sync_local", "{S}: synchrony with linked patches",
                "correlation with linked patches", "diverging",
                "Link-weighted mean correlation of log(1 + abundance) with the linked patches: "
                "high values mean the patch rises and falls with its neighbours, which makes "
                "a shared collapse more likely."),
        MapSpec("{s}_phase_locking", "{S}: phase locking with the region",
                "phase-locking value (0 to 1)", "sequential",
                "How steadily the patch's cycle keeps step with the regional mean cycle."),
        MapSpec("{s}_sync_group", "{S}: groups of patches that move together", "group",
                "categorical", "Patches of one colour form a group whose numbers move "
                "together (group 0 is the largest); grey patches have too little variation "
                "to tell.", missing=-1),
    ],
    "Metapopulation capacity": [
        MapSpec("{s}_capacity_share", "{S}: share of metapopulation capacity",
                "share of the leading eigenvector", "sequential",
                "Each patch's contribution to the metapopulation capacity of the network "
                "(Hanski & Ovaskainen 2000): large, well-connected patches score highest."),
    ],
}


def _pick_panel_patches(result, k=6):
    """A few patches worth plotting: the largest, the smallest and some in between."""
    order = result.patches["area_km2"].sort_values(ascending=False).index
    if len(order) <= k:
        return list(order)
    step = (len(order) - 1) / (k - 1)
    return [order[round(i * step)] for i in range(k)]


def write_figures_and_report(folder, result, gdf, links, summary) -> None:
    """Draw the maps and charts into ``folder/maps`` and write ``folder/report.html``."""
    from . import plot

    folder = Path(folder)
    maps = folder / "maps"
    maps.mkdir(exist_ok=True)
    sc = result.study.scenario
    sections: dict[str, list] = {}
    for section, specs in SECTIONS.items():
        for spec in specs:
            for s in SPECIES:
                col = spec.column.format(s=s)
                if col not in gdf.columns:
                    continue
                path = maps / f"{col}.png"
                frame = gdf
                if spec.missing is not None:
                    frame = gdf[[col, "geometry"]].copy()
                    frame[col] = frame[col].where(frame[col] != spec.missing).astype(object)
                    frame[col] = frame[col].map(lambda v: v if v != v else f"group {int(v)}")
                plot.patch_map(frame, col, path=path, links=links,
                               title=spec.title.format(S=s.capitalize()), label=spec.label,
                               diverging=spec.kind == "diverging",
                               categorical=spec.kind == "categorical")
                sections.setdefault(section, []).append(
                    (spec.title.format(S=s.capitalize()), path, spec.read.format(s=s)))
    data = result.trajectory.data
    panels = plot.timeseries_panels(data, _pick_panel_patches(result),
                                    path=maps / "timeseries.png", time_unit=sc["time_unit"],
                                    burn_in=sc["run.burn_in"])
    occupancy = plot.occupancy_curve(data, path=maps / "occupancy.png",
                                     time_unit=sc["time_unit"])
    sections.setdefault("Persistence", []).extend([
        ("Share of patches occupied over time", occupancy,
         "A falling curve means a species is losing patches faster than it recolonises them."),
        ("Abundance in six patches, largest to smallest", panels,
         "Prey (solid) and predator (dashed) numbers; the grey band is the burn-in, left out "
         "of every figure above."),
    ])
    extras = getattr(result, "extras", {}) or {}
    if extras.get("by_distance") and hasattr(plot, "synchrony_distance_plot"):
        path = plot.synchrony_distance_plot(extras["by_distance"],
                                            path=maps / "synchrony_distance.png")
        sections.setdefault("Synchrony", []).append(
            ("Synchrony against distance", path,
             "Correlation between pairs of patches by the distance between them, with a "
             "bootstrap band; the faster it falls, the more local the fluctuations."))
    if extras.get("kuramoto") and hasattr(plot, "kuramoto_plot"):
        path = plot.kuramoto_plot(extras["kuramoto"], path=maps / "phase_order.png",
                                  time_unit=sc["time_unit"])
        sections.setdefault("Synchrony", []).append(
            ("Phase order over time", path,
             "The Kuramoto order parameter: 1 when every patch cycles in step, near 0 when "
             "their cycles are spread out."))
    if "replicate" in data.dims and hasattr(plot, "regional_extinction_plot"):
        path = plot.regional_extinction_plot(data, path=maps / "predator_regional_extinction.png",
                                             time_unit=sc["time_unit"])
        sections.setdefault("Persistence", []).append(
            ("Probability that the predator is gone from every patch by time t", path,
             f"Share of the {data.sizes['replicate']} replicate runs in which the predator had "
             "vanished from the whole network by each time, with its 95% Wilson interval."))
    (folder / "report.html").write_text(_html(result, summary, sections), encoding="utf-8")


def _figures_html(figures) -> str:
    esc = html.escape
    return "\n".join(f"<figure>{_img(p)}<figcaption><strong>{esc(t)}.</strong> {esc(r)}"
                     "</figcaption></figure>" for t, p, r in figures)


def add_section(report: Path, name: str, figures, *, intro: str = "") -> None:
    """Insert a section (heading, a paragraph, figures with a reading guide each) into a
    written report, before its closing provenance line; used by commands that add their own
    results to a run's report (``spread``)."""
    report = Path(report)
    text = report.read_text(encoding="utf-8")
    block = (f"<h2>{html.escape(name)}</h2>\n"
             + (f"<p>{html.escape(intro)}</p>\n" if intro else "")
             + _figures_html(figures) + "\n")
    marker = "<p><small>Run "
    at = text.rfind(marker)
    text = text[:at] + block + text[at:] if at >= 0 else text + block
    report.write_text(text, encoding="utf-8")


def _img(path: Path) -> str:
    data = base64.b64encode(Path(path).read_bytes()).decode("ascii")
    return f'<img alt="{html.escape(Path(path).stem)}" src="data:image/png;base64,{data}">'


def _fmt(value, kind="number"):
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    if kind == "share":
        return f"{value:.1%}"
    if isinstance(value, float):
        return f"{value:.3g}"
    return str(value)


RESPONSE_WORDS = {"lotka_volterra": "linear (Lotka–Volterra, type I)",
                  "holling2": "Holling type II", "holling3": "Holling type III",
                  "beddington_deangelis": "Beddington–DeAngelis"}


def _scenario_words(result) -> str:
    sc = result.study.scenario
    land, net = result.study.landscape, result.study.network.summary()
    area = land.area_km2
    return (
        f"{net['patches']} habitat patches ({area.sum():.1f} km² in all, {area.min():.2g} to "
        f"{area.max():.2g} km² each) joined by {net['links']} links into "
        f"{net['components']} connected group(s), {len(net['isolated'])} patch(es) isolated. "
        f"Prey grow by the {sc['prey.growth']} form at rate {_fmt(sc['prey.growth_rate'])} per "
        f"{sc['time_unit']} up to {_fmt(sc['prey.capacity_density'])} per km² (times patch "
        f"quality); predators eat them with a {RESPONSE_WORDS[sc['predation.response']]} "
        f"response and die at rate {_fmt(sc['predator.mortality_rate'])} per "
        f"{sc['time_unit']}. Dispersal follows a {sc['dispersal.kernel']} kernel up to "
        f"{_fmt(sc['dispersal.max_distance_km'])} km. The run lasts "
        f"{_fmt(sc['run.duration'])} {sc['time_unit']}s; the first "
        f"{_fmt(sc['run.burn_in'])} are burn-in."
    )


def _headline_rows(summary):
    rows = []
    for s in SPECIES:
        rows += [
            (f"{s}: share of patches where it persists",
             _fmt(summary.get(f"{s}_regional_persistence"), "share")),
            (f"{s}: the same, weighted by area", _fmt(summary.get(f"{s}_area_persistence"), "share")),
            (f"{s}: mean pairwise synchrony", _fmt(summary.get(f"{s}_synchrony"))),
        ]
        for key, label in ((f"{s}_kuramoto_mean", f"{s}: mean phase order"),
                           (f"{s}_community_synchrony", f"{s}: community synchrony φ"),
                           (f"{s}_metapopulation_capacity", f"{s}: metapopulation capacity λ_M")):
            if key in summary:
                rows.append((label, _fmt(summary[key])))
    if "stability" in summary:
        rows.append(("coexistence state", summary["stability"]))
    solver = summary["solver"]
    rows.append(("solver", f"{solver['method']}, {solver['nfev']} right-hand-side evaluations"))
    return rows


def _html(result, summary, sections) -> str:
    sc = result.study.scenario
    esc = html.escape
    table = "\n".join(f"<tr><th>{esc(k)}</th><td>{esc(v)}</td></tr>"
                      for k, v in _headline_rows(summary))
    body = []
    for name, figures in sections.items():
        body.append(f"<h2>{esc(name)}</h2>")
        body.append(_figures_html(figures))
    prov = summary["provenance"]
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>{esc(sc.name)} — trophoscape report</title>
<style>
body {{ font-family: sans-serif; max-width: 1120px; margin: 2em auto; color: #222;
        line-height: 1.4; }}
.caution {{ border-left: 4px solid #b35806; background: #fdf3e7; padding: .6em 1em; }}
table {{ border-collapse: collapse; }} th, td {{ text-align: left; padding: .2em .8em; }}
th {{ font-weight: normal; color: #555; }}
figure {{ display: inline-block; margin: .5em; width: 530px; vertical-align: top; }}
figure img {{ max-width: 100%; }} figcaption {{ font-size: .9em; color: #444; }}
</style></head><body>
<h1>{esc(sc.name)}</h1>
<p>{esc(_scenario_words(result))}</p>
<p class="caution"><strong>Caution.</strong> {esc(CAUTION)}</p>
<h2>Headline results</h2>
<table>{table}</table>
{''.join(body)}
<p><small>Run {esc(prov['created'])} with trophoscape {esc(prov['version'])}; scenario sha256
{esc(prov['scenario_sha256'][:12])}…; seed {esc(str(prov['seed']))}.</small></p>
</body></html>
"""
