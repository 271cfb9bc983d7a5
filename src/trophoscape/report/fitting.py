"""The folder of ``fit``: estimates with their intervals, the fitted scenario, a summary, the
counts beside their fitted values, figures and a report page.

- ``estimates.csv``: ``parameter,estimate,low,high`` (95 % profile-likelihood intervals), then
  ``start``, ``lower_bound``, ``upper_bound`` and ``open_ends`` (the ends where the interval
  reached a bound: the value is not identifiable from the counts there);
- ``fitted.toml``: the scenario with the estimates in place, its file paths rewritten to
  resolve from the folder, ``[fit]`` kept (every command accepts it);
- ``summary.json``: ``log_likelihood``, ``aic``, the observation model's sd or dispersion per
  species, convergence, starts agreeing, model runs, correlations, warnings, provenance;
- ``fitted_counts.csv``: each count with the fitted expected count;
- ``figures/fit_patches.png``, ``figures/fit_scatter.png``, ``figures/fit_profiles.png`` and
  ``report.html`` (unless figures are turned off).
"""

from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np

__all__ = ["fit_to_folder", "fitted_scenario_text"]


def fit_to_folder(scenario, counts, out, *, workers=None, plots: bool = True,
                  force: bool = False, progress: bool = False):
    """Fit the scenario's ``[fit]`` values to a counts table and write the folder ``out``:
    what ``trophoscape fit`` does. The output folder is checked before the fit, and written
    whole or not at all. Returns the :class:`~trophoscape.workflows.fitting.Fit`.
    """
    from ..errors import InputError
    from ..io.folder import check_out, file_sha256, staged_folder
    from ..io.tables import provenance, write_json
    from ..scenario import input_files
    from ..workflows.fitting import fit_counts, read_counts
    from ..workflows.study import Study, load_study
    from ..workflows.tasks import check_workers

    check_workers(workers)
    study = scenario if isinstance(scenario, Study) else load_study(scenario)
    sc = study.scenario
    keys = list(sc["fit.estimate"])
    if not keys:
        raise InputError("the scenario has nothing to estimate; add a [fit] section with "
                         "estimate = [\"prey.growth_rate\", ...]", file=sc.path,
                         field="fit.estimate")
    observation = sc["fit.observation"]
    counts_path = Path(counts)
    inputs = input_files(sc) + [counts_path]
    real = check_out(out, inputs=inputs, force=force)  # before the fit
    table = read_counts(counts_path, study, observation=observation)
    fit = fit_counts(study, table, keys, observation=observation, bounds=sc["fit.bounds"],
                     detection=sc["fit.detection"], starts=int(sc["fit.starts"]),
                     seed=int(sc["run.seed"]), workers=workers, progress=progress)
    summary = fit_summary(study, table, fit)
    summary["provenance"] = provenance(study)
    summary["provenance"]["counts_file"] = str(counts_path.resolve())
    summary["provenance"]["counts_sha256"] = file_sha256(counts_path)
    with staged_folder(out, force=force, inputs=inputs, command="fit",
                       checked=True) as stage:
        _estimates_frame(sc, fit).to_csv(stage / "estimates.csv", index=False)
        (stage / "fitted.toml").write_text(
            fitted_scenario_text(sc, fit.estimates, real, counts_path), encoding="utf-8")
        _counts_frame(study, table, fit).to_csv(stage / "fitted_counts.csv", index=False)
        write_json(stage / "summary.json", summary)
        if plots:
            _write_figures_and_report(stage, study, table, fit, summary)
    return fit


def fit_summary(study, counts, fit) -> dict:
    """The network-level figures of a fit, as ``summary.json`` holds them."""
    sc = study.scenario
    extra_name = {"lognormal": "observation_sd", "negative_binomial": "dispersion"}
    out = {
        "scenario": sc.name,
        "time_unit": sc["time_unit"],
        "observation": fit.observation,
        "detection": sc["fit.detection"],
        "counts": fit.n_counts,
        "counts_prey": int(np.sum(counts.species == 0)),
        "counts_predator": int(np.sum(counts.species == 1)),
        "estimated": list(fit.estimates),
        "estimates": {k: {"estimate": v, "low": fit.low[k], "high": fit.high[k],
                          "open_ends": fit.open_ends[k],
                          "standard_error_of_log": fit.standard_error[k]}
                      for k, v in fit.estimates.items()},
        "log_likelihood": fit.log_likelihood,
        "aic": fit.aic,
        "quantities_estimated": len(fit.estimates) + len(fit.extras),
    }
    if fit.observation in extra_name:
        for species in ("prey", "predator"):
            out[f"{extra_name[fit.observation]}_{species}"] = fit.extras.get(species)
    out.update({
        "converged": fit.converged,
        "starts": fit.starts,
        "starts_agreeing": fit.agreeing,
        "model_runs": fit.evaluations,
        "correlation": {"parameters": list(fit.estimates),
                        "matrix": np.round(fit.correlation, 4).tolist()},
        "warnings": list(fit.warnings),
        "method": ("maximum likelihood: scipy.optimize.least_squares (trust-region "
                   "reflective, bounded, in log-values) on deviance residuals, gradients by "
                   "forward differences; 95 % intervals from the profile likelihood "
                   "(chi-squared, 1 degree of freedom); runs without removals below the "
                   "extinction threshold, at tolerances 100 times the scenario's"),
    })
    return out


def _estimates_frame(sc, fit):
    import pandas as pd

    rows = []
    for k, v in fit.estimates.items():
        lo, hi = fit.bounds[k]  # as searched: a default range narrowed to what k accepts
        rows.append({"parameter": k, "estimate": v, "low": fit.low[k], "high": fit.high[k],
                     "start": float(sc[k]), "lower_bound": lo, "upper_bound": hi,
                     "open_ends": ";".join(fit.open_ends[k])})
    return pd.DataFrame(rows)


def _counts_frame(study, counts, fit):
    import pandas as pd

    return pd.DataFrame({"patch_id": np.asarray(study.ids, dtype=str)[counts.patch],
                         "time": counts.time,
                         "species": np.where(counts.species == 1, "predator", "prey"),
                         "count": counts.count, "expected": fit.expected})


def _toml_value(value) -> str:
    from ..workflows.template import toml_string

    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        return toml_string(value)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{_toml_key(k)} = {_toml_value(v)}"
                               for k, v in value.items()) + "}"
    raise TypeError(f"cannot write {value!r} in TOML")


def _toml_key(key) -> str:
    """A bare key where TOML allows one (letters, digits, ``_`` and ``-``), else quoted."""
    import re

    from ..workflows.template import toml_string

    return str(key) if re.fullmatch(r"[A-Za-z0-9_-]+", str(key)) else toml_string(key)


def _toml_text(raw: dict) -> str:
    """A scenario's nested tables as TOML (TOML v1.0.0): top-level values, then one
    ``[section]`` per table, arrays of tables as ``[[name]]``; tables within a section
    inline."""
    lines = []
    tables = {k: v for k, v in raw.items() if isinstance(v, dict)}
    arrays = {k: v for k, v in raw.items()
              if isinstance(v, list) and v and all(isinstance(t, dict) for t in v)}
    for k, v in raw.items():
        if k not in tables and k not in arrays:
            lines.append(f"{_toml_key(k)} = {_toml_value(v)}")
    for name, table in tables.items():
        lines += ["", f"[{_toml_key(name)}]"]
        lines += [f"{_toml_key(k)} = {_toml_value(v)}" for k, v in table.items()]
    for name, items in arrays.items():
        for table in items:
            lines += ["", f"[[{_toml_key(name)}]]"]
            lines += [f"{_toml_key(k)} = {_toml_value(v)}" for k, v in table.items()]
    return "\n".join(lines) + "\n"


def fitted_scenario_text(scenario, estimates: dict, folder, counts_path=None) -> str:
    """The scenario (as it was fitted: its values, not its file's text) as TOML with
    ``estimates`` (``"section.key"`` → value) in place and its file paths rewritten to
    resolve from ``folder`` (relative where they can be).

    Every key is written, defaults included; comments of the original are not kept; a
    header says where the file came from.
    """
    from ..scenario import INPUT_FILES, nested_tables
    from ..workflows.template import _plain

    raw = nested_tables(dict(scenario.values))  # the scenario as fitted, defaults included
    for key, value in estimates.items():
        section, _, name = key.partition(".")
        raw.setdefault(section, {})[name] = float(value)
    folder = Path(folder).resolve()
    for key in INPUT_FILES:
        section, _, name = key.partition(".")
        value = raw.get(section, {}).get(name)
        if isinstance(value, str) and value:
            target = Path(scenario.resolve(value)).resolve()
            try:
                new = os.path.relpath(target, folder)
            except ValueError:  # another drive
                new = str(target)
            raw[section][name] = Path(new).as_posix()
    source = scenario.path if scenario.path is not None else "a scenario built in code"
    header = [f"# Written by trophoscape fit from {_plain(source)}",
              "# with " + _plain(", ".join(estimates)) + " estimated"
              + (f" from {_plain(counts_path)}" if counts_path else "")
              + " (estimates.csv beside this file holds their 95 % intervals).",
              "# File paths resolve from this file's folder. Every key is written, defaults "
              "included; comments of the original are not kept."]
    return "\n".join(header) + "\n" + _toml_text(raw)


def _shown_patches(study, counts, k: int):
    """Up to ``k`` patches with the most counts (ties by their order in the landscape)."""
    per = np.bincount(counts.patch, minlength=study.landscape.n_patches)
    order = np.lexsort((np.arange(per.size), -per))
    return [int(i) for i in order[:k] if per[i] > 0]


def _write_figures_and_report(stage: Path, study, counts, fit, summary) -> None:
    from ..workflows.fitting import Counts, expected_counts, searched_study
    from .figures import (MAX_FIT_PANELS, fitted_counts_panels, observed_fitted_scatter,
                          profile_panels)
    from .html import footer_text, page_html, section_html, table_html

    folder = stage / "figures"
    folder.mkdir(exist_ok=True)
    ids = np.asarray(study.ids, dtype=str)
    unit = study.scenario["time_unit"]
    shown = _shown_patches(study, counts, MAX_FIT_PANELS)
    end = float(counts.time.max())
    grid = np.linspace(0.0, end, 201) if end > 0 else np.zeros(1)
    p, t, s = np.meshgrid(np.asarray(shown, dtype=np.int64), grid, [0, 1], indexing="ij")
    along = Counts(patch=p.ravel(), time=t.ravel(), species=s.ravel(),
                   count=np.zeros(p.size))
    values = expected_counts(searched_study(study, fit.estimates), along,
                             detection=study.scenario["fit.detection"]).reshape(p.shape)
    course = {ids[q]: (grid, values[i, :, 0], values[i, :, 1]) for i, q in enumerate(shown)}
    observed = {}
    for q in shown:
        rows = counts.patch == q
        observed[ids[q]] = (counts.time[rows], counts.count[rows], counts.species[rows])
    figures = [
        ("Counts and the fitted model, patch by patch", fitted_counts_panels(
            course, observed, path=folder / "fit_patches.png", time_unit=unit),
         f"Points are the counts; lines the counts the fitted model expects. "
         f"{len(shown)} of {len(np.unique(counts.patch))} counted patches are shown, those "
         "with the most counts."),
        ("Every count against its fitted value", observed_fitted_scatter(
            counts.count, fit.expected, counts.species, path=folder / "fit_scatter.png"),
         "Points near the line are counts the model reproduces; a bend away from it at one "
         "end says the model misses low or high numbers."),
    ]
    if any(np.isfinite(fit.low[k]) for k in fit.estimates):
        figures.append(("How well each value is determined", profile_panels(
            {k: (fit.profiles[k][0], fit.profiles[k][1], fit.estimates[k], fit.low[k],
                 fit.high[k]) for k in fit.estimates if k in fit.profiles},
            path=folder / "fit_profiles.png"),
            "Each panel holds one value fixed at points away from its estimate and "
            "re-estimates the others. Where the curve crosses the dashed line, the counts "
            "become unlikely (95 % interval). A curve that stays low to the edge of the "
            "search means the counts do not pin that value down."))
    import pandas as pd

    est = pd.DataFrame([{"parameter": k, "estimate": v, "low": fit.low[k],
                         "high": fit.high[k],
                         "determined": "no, reaches its bound" if fit.open_ends[k] else "yes"}
                        for k, v in fit.estimates.items()])
    extra_name = {"lognormal": "scatter of counts (sd of log count)",
                  "negative_binomial": "dispersion of counts (smaller: more scattered)"}
    facts = [f"{fit.n_counts} counts ({summary['counts_prey']} prey, "
             f"{summary['counts_predator']} predator) under the {fit.observation.replace('_', ' ')}"
             f" model; log-likelihood {fit.log_likelihood:.6g}, AIC {fit.aic:.6g}."]
    if fit.extras:
        facts.append(f"{extra_name[fit.observation]}: " + ", ".join(
            f"{s} {v:.3g}" for s, v in fit.extras.items()) + ".")
    facts.append(f"{fit.agreeing} of {fit.starts} starting points reached the same best fit; "
                 f"{fit.evaluations} model runs"
                 + ("" if fit.converged else "; the search stopped on its run limit, "
                                             "not on its tolerances") + ".")
    blocks = [table_html(est, caption="Estimates and 95 % intervals"), *facts]
    if fit.warnings:
        blocks.append("Cautions: " + " ".join(f"({i + 1}) {w}." for i, w in
                                               enumerate(fit.warnings)))
    body = section_html(
        f"Fit of {study.scenario.name} to survey counts", figures,
        intro="The values below were set so that the model's expected counts match the "
              "survey counts as closely as the chosen observation model allows. The "
              "intervals show the range of values the counts cannot rule out. fitted.toml "
              "holds the scenario with these values; every command accepts it. The caution "
              "of every result applies: these are model projections for comparing options; "
              "decisions need field data, the assessment local rules require and qualified "
              "practitioners.",
        blocks=blocks)
    page = page_html(f"Fit: {study.scenario.name}", body,
                     footer_text(summary["provenance"]))
    (stage / "report.html").write_text(page, encoding="utf-8")
