"""Figures of a run and the self-contained HTML report (figures embedded as data URIs).

The report opens with the scenario in plain words and the caution, then the headline
figures, then one section per analysis; every figure carries one sentence on how to read it.
Figures whose columns a run did not produce are left out.

Every piece of text that can come from the user (the scenario name, the time unit, patch,
corridor and scenario ids, file names, column names, error messages) is escaped with
:func:`html.escape` (``&``, ``<``, ``>`` and both quotes, so it is safe in text and in
double-quoted attribute values alike) where it enters the page; only :class:`Html` pieces
built here are inserted as they are. The page holds no script.
"""

from __future__ import annotations

import base64
import html
import math
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import quote

import numpy as np

from ..model.system import SPECIES

__all__ = ["write_figures_and_report", "write_report", "write_comparison_report",
           "section_html", "Html", "table_html", "CAUTION"]

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


def write_figures_and_report(folder, result, gdf, links, summary, extra_sections=()) -> None:
    """Draw the maps and charts into ``folder/maps`` and write ``folder/report.html``.

    ``extra_sections``: HTML of sections a command adds after the run's own
    (:func:`section_html`); the page is built with them and written once."""
    from . import figures as plot

    folder = Path(folder)
    maps = folder / "maps"
    maps.mkdir(exist_ok=True)
    sc = result.study.scenario
    sections: dict[str, list] = {}
    canvas = plot.MapCanvas(gdf, links)  # the patches and links prepared once for every map
    for section, specs in SECTIONS.items():
        for spec in specs:
            for s in SPECIES:
                col = spec.column.format(s=s)
                # absent, or all empty because its analysis failed (see analysis_errors)
                if col not in gdf.columns or not gdf[col].notna().any():
                    continue
                path = maps / f"{col}.png"
                frame = gdf
                if spec.missing is not None:
                    frame = gdf[[col, "geometry"]].copy()
                    frame[col] = frame[col].where(frame[col] != spec.missing).astype(object)
                    frame[col] = frame[col].map(lambda v: v if v != v else f"group {int(v)}")
                plot.patch_map(frame, col, path=path, canvas=canvas,
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
                                     time_unit=sc["time_unit"],
                                     extinction_abundance=sc["run.extinction_abundance"],
                                     burn_in=sc["run.burn_in"])
    by_size = []
    persists = {s: gdf[f"{s}_persists"].astype("boolean").to_numpy(dtype=float,
                                                                   na_value=np.nan)
                for s in SPECIES
                if f"{s}_persists" in gdf.columns and gdf[f"{s}_persists"].notna().any()}
    if persists and "area_km2" in gdf.columns:
        by_size = [("Persistence by patch size", plot.size_class_plot(
            gdf["area_km2"].to_numpy(dtype=float), persists, path=maps / "persistence_by_size.png"),
            "Each bar is the share of patches of that size class where the species is present "
            "at the end. Where small patches lose a species first, the network depends on its "
            "large patches; on a large network this says more than the maps can.")]
    sections.setdefault("Persistence", []).extend([
        ("Share of patches occupied over time", occupancy,
         "A patch counts as occupied while it holds at least the run's extinction abundance "
         "(immigrants gathering below it do not count). A falling curve means a species is "
         "losing patches faster than it recolonises them."),
        *by_size,
        ("Abundance in six patches, largest to smallest", panels,
         "Prey (solid) and predator (dashed) numbers; the grey band is the burn-in, left out "
         "of every map and statistic above."),
    ])
    extras = getattr(result, "extras", {}) or {}
    if extras.get("by_distance"):
        path = plot.synchrony_distance_plot(extras["by_distance"],
                                            path=maps / "synchrony_distance.png")
        sections.setdefault("Synchrony", []).append(
            ("Synchrony against distance", path,
             "Correlation between pairs of patches by the distance between them, with a "
             "bootstrap band; the faster it falls, the more local the fluctuations."))
    if extras.get("kuramoto"):
        path = plot.kuramoto_plot(extras["kuramoto"], path=maps / "phase_order.png",
                                  time_unit=sc["time_unit"])
        sections.setdefault("Synchrony", []).append(
            ("Phase order over time", path,
             "The Kuramoto order parameter: 1 when every patch cycles in step, near 0 when "
             "their cycles are spread out."))
    if "replicate" in data.dims:
        path = plot.regional_extinction_plot(data, path=maps / "predator_regional_extinction.png",
                                             time_unit=sc["time_unit"])
        sections.setdefault("Persistence", []).append(
            ("Probability that the predator is gone from every patch by time t", path,
             f"Share of the {data.sizes['replicate']} replicate runs in which the predator had "
             "vanished from the whole network by each time, with its 95% Wilson interval."))
    (folder / "report.html").write_text(_html(result, summary, sections, extra_sections),
                                        encoding="utf-8")


def write_report(folder, result, extra_sections=()) -> Path:
    """The maps and ``report.html`` of a run, without the run's data files.

    For commands whose folder is about something else but whose report opens with the
    network as it is (``corridors``): the same figures and page as :func:`write_figures_and_report`
    called by :func:`trophoscape.report.run.write_run`.
    """
    from ..io.tables import patches_frame, provenance

    folder = Path(folder)
    gdf = patches_frame(result)
    links = result.study.network.links_frame(result.study.landscape)
    summary = dict(result.summary)
    summary["provenance"] = provenance(result.study)
    write_figures_and_report(folder, result, gdf, links, summary, extra_sections)
    return folder / "report.html"


class Html(str):
    """A piece of HTML that is already safe to insert (not escaped again)."""


def _block(part) -> str:
    """A block of a section: :class:`Html` as it is, any other text as an escaped paragraph."""
    return part if isinstance(part, Html) else f"<p>{html.escape(str(part))}</p>"


def _cell(value) -> str:
    if value is None:
        return "–"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (float, np.floating)):
        if not math.isfinite(value):
            return "–"
        return "0" if value == 0 else f"{value:.4g}"  # no "-0"
    return html.escape(str(value))


def table_html(frame, columns=None, *, n=None, labels=None, caption=None) -> Html:
    """A table of the first ``n`` rows of ``frame`` (all by default).

    ``labels`` maps a column to its header (default: the column name with spaces for
    underscores); the column name itself stays in the header's tooltip, so a reader can find
    it in the CSV.
    """
    columns = list(frame.columns if columns is None else columns)
    labels = labels or {}
    head = "".join(f'<th title="{html.escape(str(c))}">'
                   f"{html.escape(str(labels.get(c, str(c).replace('_', ' '))))}</th>"
                   for c in columns)
    rows = frame if n is None else frame.head(n)
    body = "".join("<tr>" + "".join(f"<td>{_cell(row[c])}</td>" for c in columns) + "</tr>"
                   for _, row in rows.iterrows())
    cap = f"<caption>{html.escape(str(caption))}</caption>" if caption else ""
    return Html(f'<div class="wide"><table class="data">{cap}<thead><tr>{head}</tr></thead>'
                f"<tbody>{body}</tbody></table></div>")


def _figures_html(figures) -> str:
    esc = html.escape
    return "\n".join(f"<figure>{_img(p)}<figcaption><strong>{esc(str(t))}.</strong> "
                     f"{esc(str(r))}</figcaption></figure>" for t, p, r in figures)


def figures_html(figures) -> Html:
    """Figures ``(title, png path, how to read it)`` as a block of a section."""
    return Html(_figures_html(figures))


def section_html(name: str, figures=(), *, intro: str = "", blocks=(),
                 anchor: str | None = None) -> Html:
    """The HTML of one section a command adds to a run's report (``extra_sections`` of
    :func:`write_figures_and_report`): a heading, an ``intro`` paragraph, then ``blocks`` in
    order (plain text becomes a paragraph; :class:`Html` from :func:`table_html`,
    :func:`figures_html` goes in as it is), then ``figures`` (``(title, png path, how to
    read it)``)."""
    ident = f' id="{html.escape(str(anchor))}"' if anchor else ""
    parts = [f"<h2{ident}>{html.escape(str(name))}</h2>"]
    if intro:
        parts.append(_block(intro))
    parts += [_block(b) for b in blocks]
    if figures:
        parts.append(_figures_html(figures))
    return Html("\n".join(parts) + "\n")


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


def _article(word: str) -> str:
    return "an" if str(word)[:1].lower() in "aeiou" else "a"


def _scenario_words(result) -> str:
    sc = result.study.scenario
    model = result.study.system.model
    growth, response = model.growth_form, model.functional_response
    land, net = result.study.landscape, result.study.network.summary()
    area = land.area_km2
    return (
        f"{net['patches']} habitat patches ({area.sum():.1f} km² in all, {area.min():.2g} to "
        f"{area.max():.2g} km² each) joined by {net['links']} links into "
        f"{net['components']} connected group(s), {len(net['isolated'])} patch(es) isolated. "
        f"Prey grow by the {growth.words or growth.name} form at rate {_fmt(sc['prey.growth_rate'])} per "
        f"{sc['time_unit']} up to {_fmt(sc['prey.capacity_density'])} per km² (times patch "
        f"quality); predators eat them with a {response.words} "
        f"response and die at rate {_fmt(sc['predator.mortality_rate'])} per "
        f"{sc['time_unit']}. Dispersal follows {_article(sc['dispersal.kernel'])} {sc['dispersal.kernel']} kernel up to "
        f"{_fmt(sc['dispersal.max_distance_km'])} km{_resistance_words(sc)}. The run lasts "
        f"{_fmt(sc['run.duration'])} {sc['time_unit']}s; the first "
        f"{_fmt(sc['run.burn_in'])} are burn-in."
    )


def _resistance_words(sc) -> str:
    """How distances are counted, when not straight (the scenario's resistance keys)."""
    words = []
    if sc["dispersal.resistance"]:
        words.append(" of least-cost distance over the resistance raster "
                     f"{Path(sc['dispersal.resistance']).name}")
    elif sc["dispersal.matrix_resistance"] != 1.0:
        words.append(f", each km between patches counting as "
                     f"{_fmt(sc['dispersal.matrix_resistance'])}")
    if sc["dispersal.corridors"]:
        words.append(f"; a km along a corridor counts as "
                     f"{_fmt(sc['dispersal.corridor_resistance'])} unless the corridor "
                     "says otherwise")
    return "".join(words)


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
    if summary.get("stability") is not None:
        rows.append(("coexistence state", summary["stability"]))
    removed = summary.get("quasi_extinction")
    if removed:
        rows.append(("local populations removed (quasi-extinction rule)",
                     ", ".join(f"{s} {removed[s]['removals']:,}" for s in SPECIES
                               if s in removed)))
    solver = summary["solver"]
    rows.append(("solver", f"{solver['method']}, {solver['nfev']} right-hand-side evaluations"
                 + (", local equations compiled" if solver.get("local_terms") == "compiled"
                    else "")))
    return rows


STYLE = """
body { font-family: sans-serif; max-width: 1120px; margin: 2em auto; color: #222;
       line-height: 1.4; }
.caution { border-left: 4px solid #b35806; background: #fdf3e7; padding: .6em 1em; }
.failed { border-left: 4px solid #b2182b; background: #fbe9e9; padding: .6em 1em; }
table { border-collapse: collapse; } th, td { text-align: left; padding: .2em .8em; }
th { font-weight: normal; color: #555; }
.wide { overflow-x: auto; margin: .5em 0; }
table.data { font-size: .9em; } table.data td, table.data th { padding: .2em .6em; }
table.data thead th { border-bottom: 1px solid #999; color: #333; vertical-align: bottom; }
table.data tbody tr:nth-child(even) { background: #f4f4f4; }
table.data caption { text-align: left; color: #444; padding-bottom: .3em; }
figure { display: inline-block; margin: .5em; width: 530px; vertical-align: top; }
figure img { max-width: 100%; } figcaption { font-size: .9em; color: #444; }
"""


def page_html(title: str, body: str, footer: str) -> str:
    """A whole self-contained page: ``body`` is HTML; ``footer`` the provenance line's text."""
    esc = html.escape
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>{esc(str(title))} — trophoscape report</title>
<style>{STYLE}</style></head><body>
{body}
<p><small>{esc(str(footer))}</small></p>
</body></html>
"""


def footer_text(prov) -> str:
    """The provenance line of a report from a run's ``provenance`` dict."""
    return (f"Run {prov['created']} with trophoscape {prov['version']}; scenario sha256 "
            f"{prov['scenario_sha256'][:12]}…; seed {prov['seed']}.")


#: The words the report uses for each analysis named in ``analysis_errors``.
ANALYSIS_WORDS = {
    "persistence": "persistence",
    "synchrony": "synchrony",
    "stability": "stability of the coexistence state",
    "capacity": "metapopulation capacity",
}


def analysis_errors_html(summary) -> str:
    """A box listing the analyses that failed (``summary["analysis_errors"]``); "" if none."""
    errors = summary.get("analysis_errors") or []
    if not errors:
        return ""
    esc = html.escape
    items = "".join(
        f"<li><strong>{esc(str(ANALYSIS_WORDS.get(e['analysis'], e['analysis'])))}</strong>: "
        f"{esc(str(e['reason']))}</li>" for e in errors)
    return (f'<div class="failed"><p><strong>{len(errors)} analysis(es) failed.</strong> '
            "The other results below are complete; the figures and columns of the failed "
            "ones are left empty (– here, blank in patches.csv, null in summary.json) and "
            f"their maps are left out.</p><ul>{items}</ul></div>")


def _html(result, summary, sections, extra_sections=()) -> str:
    sc = result.study.scenario
    esc = html.escape
    table = "\n".join(f"<tr><th>{esc(str(k))}</th><td>{esc(str(v))}</td></tr>"
                      for k, v in _headline_rows(summary))
    body = [f"<h1>{esc(str(sc.name))}</h1>",
            f"<p>{esc(_scenario_words(result))}</p>",
            f'<p class="caution"><strong>Caution.</strong> {esc(CAUTION)}</p>',
            "<h2>Headline results</h2>", analysis_errors_html(summary),
            f"<table>{table}</table>"]
    for name, figures in sections.items():
        body.append(f"<h2>{esc(name)}</h2>")
        body.append(_figures_html(figures))
    body.extend(extra_sections)
    return page_html(sc.name, "\n".join(body), footer_text(summary["provenance"]))


def write_comparison_report(folder, results, table, maps, *, names=None, runs=None) -> Path:
    """``folder/report.html`` of ``compare``: each scenario in plain words, the caution, the
    headline results side by side, the difference maps, links to each scenario's report.

    Parameters
    ----------
    results : sequence of RunResult
        The first is the reference.
    table : pandas.DataFrame
        :func:`trophoscape.workflows.planning.compare_results` of ``results``.
    maps : sequence of (column, other name, png path)
        Difference maps, other − reference.
    runs : sequence of str, optional
        Each scenario's own folder, relative to ``folder`` (linked when it has a report).
    """
    from .. import __version__
    import datetime as _dt

    folder = Path(folder)
    esc = html.escape
    names = list(table.index if names is None else names)
    ref = names[0]
    body = [f"<h1>Comparison of {len(results)} scenarios</h1>",
            f"<p>Each scenario was run as it is. Differences are the other scenario minus the "
            f"reference, <strong>{esc(str(ref))}</strong>, patch by patch for the patches both "
            "share by id.</p><ul>"]
    for k, (name, r) in enumerate(zip(names, results)):
        link = ""
        if runs is not None and (folder / runs[k] / "report.html").is_file():
            # a relative URL: percent-encoded as a path, then escaped for the attribute
            href = esc(quote(f"{runs[k]}/report.html"))
            link = f' (<a href="{href}">its own report</a>)'
        body.append(f"<li><strong>{esc(str(name))}</strong>{link}: "
                    f"{esc(_scenario_words(r))}</li>")
    body.append("</ul>")
    body.append(f'<p class="caution"><strong>Caution.</strong> {esc(CAUTION)}</p>')
    rows: dict = {}
    for r in results:
        for label, _ in _headline_rows(r.summary):
            rows.setdefault(label, None)
    cells = [dict(_headline_rows(r.summary)) for r in results]
    head = "".join(f"<th>{esc(str(n))}</th>" for n in names)
    lines = "".join(f"<tr><th>{esc(str(label))}</th>"
                    + "".join(f"<td>{esc(str(c.get(label, '–')))}</td>" for c in cells)
                    + "</tr>"
                    for label in rows)
    body += ["<h2>Headline results side by side</h2>",
             "<p>One column per scenario; comparison.csv holds every network-level figure.</p>",
             f'<div class="wide"><table class="data"><thead><tr><th></th>{head}</tr></thead>'
             f"<tbody>{lines}</tbody></table></div>"]
    if maps:
        body.append("<h2>Differences, patch by patch</h2>")
        figures = []
        for column, other, path in maps:
            what = column.replace("_", " ")
            figures.append((f"{what}: {other} − {ref}", path,
                            f"Each shared patch coloured by its {what} in {other} minus in "
                            f"{ref}: purple where it is higher in {other}, orange where it is "
                            "lower, white where the two agree; patches found in only one "
                            "scenario are left out."))
        body.append(_figures_html(figures))
    created = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    footer = f"Run {created} with trophoscape {__version__}; {len(results)} scenarios."
    path = folder / "report.html"
    path.write_text(page_html(f"Comparison: {', '.join(map(str, names))}", "\n".join(body),
                              footer),
                    encoding="utf-8")
    return path
