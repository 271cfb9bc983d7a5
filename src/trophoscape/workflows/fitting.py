"""Fitting a scenario to survey counts (first part: the counts table).

A counts table holds the monitoring data a fit is measured against: one row per count,
columns ``patch_id,time,species,count``.

- ``patch_id``: a patch of the scenario's landscape;
- ``time``: in the scenario's time unit from the start of the run (t = 0), within the run;
- ``species``: ``prey`` or ``predator``;
- ``count``: individuals counted in the whole patch (an abundance, not a density), a finite
  number of at least 0; whole numbers for the Poisson and negative-binomial observation
  models, above 0 for the lognormal one (:mod:`trophoscape.analysis.observation`).

Missing years are simply absent rows; each (patch, time, species) is counted once. Every
problem is refused in one line naming the file, the row (``feature``, counted from 0 after
the header) and the column.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError, RunError

__all__ = ["Counts", "read_counts", "expected_counts", "log_likelihood", "with_rates",
           "Fit", "fit_counts"]

#: The columns of a counts table, in order.
COUNT_COLUMNS = ("patch_id", "time", "species", "count")
_SPECIES = ("prey", "predator")


@dataclass(frozen=True, eq=False)
class Counts:
    """Survey counts, one entry per row of the table, in its order.

    Attributes
    ----------
    patch : ndarray of int64
        Patch positions in the landscape.
    time : ndarray of float64
    species : ndarray of int64
        0 prey, 1 predator.
    count : ndarray of float64
    path : Path or None
    """

    patch: np.ndarray
    time: np.ndarray
    species: np.ndarray
    count: np.ndarray
    path: Path | None = None

    @property
    def n(self) -> int:
        return int(self.count.size)


def read_counts(path, study, *, observation: str = "lognormal") -> Counts:
    """Read and check a counts table against a study (its patches and its run's length).

    Parameters
    ----------
    path : str or path
    study : Study
    observation : {"lognormal", "poisson", "negative_binomial"}
        The observation model the counts will be fitted with (it decides which counts are
        possible: whole numbers, or above 0).

    Raises
    ------
    InputError
        An unreadable or empty file, a missing column, an unknown patch id or species, a
        time or count that is not a number, a time outside the run, a negative count, a
        count the observation model cannot produce, or a count given twice.
    """
    import csv

    path = Path(path)
    expected = "columns " + ",".join(COUNT_COLUMNS)
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            rows = list(csv.reader(fh))
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise InputError(f"cannot be read as a CSV table ({exc}); expected {expected}",
                         file=path) from None
    rows = [r for r in rows if any(cell.strip() for cell in r)]
    if not rows:
        raise InputError(f"the file is empty; write a header row with {expected}", file=path)
    header = [c.strip() for c in rows[0]]
    for column in COUNT_COLUMNS:
        if column not in header:
            import difflib

            close = difflib.get_close_matches(column, header, n=1)
            hint = f" ({close[0]!r} is close)" if close else ""
            raise InputError(f"the table has no {column!r} column{hint}; expected {expected}",
                             file=path, field=column)
    at = {c: header.index(c) for c in COUNT_COLUMNS}
    data = rows[1:]
    if not data:
        raise InputError("the table has no counts; add one row per count", file=path)
    table = np.array([[(row[at[c]].strip() if at[c] < len(row) else "") for c in COUNT_COLUMNS]
                      for row in data], dtype=object).reshape(-1, len(COUNT_COLUMNS))
    cells = {c: table[:, k].astype(str) for k, c in enumerate(COUNT_COLUMNS)}
    duration = float(study.scenario["run.duration"])

    def refuse(bad, column, message):
        if bad.any():
            r = int(np.flatnonzero(bad)[0])
            raise InputError(message(r), file=path, feature=r, field=column)

    ids = np.asarray(study.ids, dtype=str)
    order = np.argsort(ids)
    pos = np.minimum(np.searchsorted(ids[order], cells["patch_id"]), ids.size - 1)
    known = ids[order][pos] == cells["patch_id"]
    refuse(~known, "patch_id", lambda r: f"unknown patch {str(cells['patch_id'][r])!r}; give the id "
                                         "of a patch of the scenario's patch file")
    patch = order[pos].astype(np.int64)
    species_ok = np.isin(cells["species"], _SPECIES)
    refuse(~species_ok, "species",
           lambda r: f"{str(cells['species'][r])!r} is not a species; give prey or predator")
    species = (cells["species"] == "predator").astype(np.int64)
    numbers = {}
    for column in ("time", "count"):
        values = np.array([_number(v) for v in cells[column]], dtype=float)
        refuse(~np.isfinite(values), column,
               lambda r, c=column: f"{str(cells[c][r])!r} is not a finite number")
        numbers[column] = values
    time, count = numbers["time"], numbers["count"]
    refuse(~((time >= 0.0) & (time <= duration)), "time",
           lambda r: f"time {time[r]:g} is outside the run (0 to {duration:g}); give times "
                     "from the start of the run, in its time unit")
    refuse(count < 0, "count", lambda r: f"count {count[r]:g} is negative; give a count of at "
                                         "least 0")
    if observation in ("poisson", "negative_binomial"):
        refuse(count != np.round(count), "count",
               lambda r: f"count {count[r]:g} is not a whole number, which the {observation} "
                         "model needs; use the lognormal model for indices")
    if observation == "lognormal":
        refuse(count == 0, "count", lambda r: "a count of 0 has no density under the "
                                              "lognormal model; use the poisson or "
                                              "negative_binomial model for data with zeros")
    key = (patch * 2 + species).astype(np.float64) * (duration + 1.0) + time
    order = np.argsort(key, kind="stable")
    same = np.flatnonzero(key[order][1:] == key[order][:-1])
    if same.size:
        first, again = sorted((int(order[same[0]]), int(order[same[0] + 1])))
        raise InputError(f"counts this patch, time and species again (also row {first}); "
                         "give each count once", file=path, feature=again, field="count")
    return Counts(patch=patch, time=time, species=species, count=count, path=path)


def expected_counts(study, counts: Counts, *, detection: float = 1.0) -> np.ndarray:
    """The counts a deterministic run of ``study`` predicts for each row of ``counts``:
    ``detection`` times the species' abundance in the patch at the row's time.

    The run records the state at the counts' own times (``simulate(output_times=...)``) and
    ends at the last of them, so the values do not depend on the census interval. Noise and
    replicates are left out: the expectation is the deterministic model's.
    """
    from ..integrate.ode import RunSettings, simulate
    from .study import shock_schedule

    sc = study.scenario
    times = np.unique(counts.time)
    settings = RunSettings.from_scenario(sc).options(duration=float(max(times.max(), 0.0)))
    settings["dtype"] = np.float64
    events = shock_schedule(study)
    if settings["duration"] == 0.0:
        state = np.asarray(study.initial_state, dtype=float).reshape(2, -1)
        return detection * state[counts.species, counts.patch]
    traj = simulate(study.system, study.initial_state, ids=study.ids, events=events,
                    output_times=times, **settings)
    rows = np.searchsorted(traj.time, counts.time)
    values = np.stack([traj.data[s].values for s in ("prey", "predator")])
    return detection * values[counts.species, rows, counts.patch]


def with_rates(study, changes: dict):
    """The study with some scenario values changed (``{"prey.growth_rate": 1.3}``), its
    landscape and network kept: rates, densities, emigration, kernel scales, survival —
    anything but the keys that shape the network or the patches
    (:data:`trophoscape.workflows.study.STRUCTURE_KEYS`), which a fit cannot vary."""
    from .study import STRUCTURE_KEYS, STRUCTURE_SECTIONS, assemble_study

    for key in changes:
        if key in STRUCTURE_KEYS or key.split(".", 1)[0] in STRUCTURE_SECTIONS:
            raise InputError(f"{key} shapes the patches or the network, which a fit keeps as "
                             "they are; estimate rates and densities instead", field=key)
    scenario = study.scenario.with_values(**{k.replace(".", "__"): v
                                             for k, v in changes.items()})
    return assemble_study(scenario, study.landscape, study.network, ground=study.ground)


def log_likelihood(study, counts: Counts, *, observation: str = "lognormal",
                   detection: float = 1.0, extra=None, changes=None) -> float:
    """The log-likelihood of the counts under the study (with ``changes`` to its scenario
    values, :func:`with_rates`): the sum over the counts of the log density of each under
    ``observation`` around the expected count (:func:`expected_counts`); ``extra`` is the
    observation model's sd or dispersion."""
    from ..analysis.observation import log_density

    trial = study if not changes else with_rates(study, changes)
    expected = expected_counts(trial, counts, detection=detection)
    return float(np.sum(log_density(observation, counts.count, expected, extra)))


@dataclass(frozen=True)
class Fit:
    """A maximum-likelihood fit (:func:`fit_counts`).

    Attributes
    ----------
    estimates : dict
        Each estimated scenario key → its estimate.
    observation : str
    extra : float or None
        The observation model's sd (lognormal) or dispersion (negative binomial).
    log_likelihood : float
    aic : float
        ``2 k − 2 log L``, ``k`` counting every estimated quantity (sd or dispersion too).
    starts : int
        Starting points tried.
    agreeing : int
        Starts that ended within 0.01 of the best log-likelihood.
    converged : bool
        The best start's optimiser said it converged.
    evaluations : int
        Model runs used.
    """

    estimates: dict
    observation: str
    extra: float | None
    log_likelihood: float
    aic: float
    starts: int
    agreeing: int
    converged: bool
    evaluations: int


def fit_counts(study, counts: Counts, estimate, *, observation: str = "lognormal",
               bounds=None, detection: float = 1.0, starts: int = 4, seed: int = 1) -> Fit:
    """Maximum-likelihood estimates of some scenario values from survey counts.

    The values are searched in logarithms within ``bounds`` (key → (low, high); default a
    hundredth to a hundred times the scenario's value) from ``starts`` points: the
    scenario's values, then points drawn uniformly in the logarithms (``seed``), each
    refined by scipy's bounded Nelder–Mead. The lognormal sd is profiled out (its estimate
    given the expected counts is the root mean square of the log residuals); the negative
    binomial's dispersion is estimated with the rest, in logarithms; Poisson has none.
    The runs use tolerances a hundred times tighter than the scenario's, so that the
    likelihood is smooth enough to search.
    """
    from scipy.optimize import minimize

    from ..analysis.observation import log_density

    keys = list(estimate)
    for k in keys:
        if isinstance(study.scenario[k], bool) or not isinstance(study.scenario[k],
                                                                 (int, float)):
            raise InputError(f"{k} is taken per patch from an attribute in the scenario; a "
                             "fit estimates one value for all patches: give it a number",
                             field=k)
    base = np.array([float(study.scenario[k]) for k in keys])
    if np.any(base <= 0):
        k = keys[int(np.argmax(base <= 0))]
        raise InputError(f"{k} is {study.scenario[k]!r} in the scenario; an estimated value "
                         "must start above 0", field=k)
    bounds = dict(bounds or {})
    lo = np.log([bounds.get(k, (b / 100.0, b * 100.0))[0] for k, b in zip(keys, base)])
    hi = np.log([bounds.get(k, (b / 100.0, b * 100.0))[1] for k, b in zip(keys, base)])
    tight = study.scenario.with_values(run__rtol=study.scenario["run.rtol"] / 100.0,
                                       run__atol=study.scenario["run.atol"] / 100.0)
    from dataclasses import replace

    study = replace(study, scenario=tight)
    n_extra = 1 if observation in ("lognormal", "negative_binomial") else 0
    runs = [0]

    def unpack(theta):
        values = dict(zip(keys, np.exp(theta[:len(keys)]).tolist()))
        extra = float(np.exp(theta[len(keys)])) if observation == "negative_binomial" else None
        return values, extra

    def negative(theta):
        values, extra = unpack(theta)
        runs[0] += 1
        try:
            expected = expected_counts(with_rates(study, values), counts, detection=detection)
        except (RunError, InputError):  # a trial the model cannot run: no likelihood there
            return 1e300
        if observation == "lognormal":
            if np.any(expected <= 0):
                return 1e300
            resid = np.log(counts.count) - np.log(expected)
            extra = max(float(np.sqrt(np.mean(resid * resid))), 1e-12)
        ll = float(np.sum(log_density(observation, counts.count, expected, extra)))
        return -ll if np.isfinite(ll) else 1e300

    rng = np.random.default_rng(seed)
    dim = len(keys) + (1 if observation == "negative_binomial" else 0)
    low = np.r_[lo, [np.log(1e-3)] if observation == "negative_binomial" else []]
    high = np.r_[hi, [np.log(1e3)] if observation == "negative_binomial" else []]
    first = np.r_[np.log(base), [0.0] if observation == "negative_binomial" else []]
    points = [np.clip(first, low, high)] + [rng.uniform(low, high) for _ in range(starts - 1)]
    results = [minimize(negative, x0, method="Nelder-Mead", bounds=list(zip(low, high)),
                        options={"xatol": 1e-5, "fatol": 1e-7, "maxfev": 400 * dim})
               for x0 in points]  # a few starts
    best = min(results, key=lambda r: r.fun)
    values, extra = unpack(best.x)
    if observation == "lognormal":
        expected = expected_counts(with_rates(study, values), counts, detection=detection)
        resid = np.log(counts.count) - np.log(expected)
        extra = float(np.sqrt(np.mean(resid * resid)))
    ll = -float(best.fun)
    k = len(keys) + n_extra
    return Fit(estimates=values, observation=observation, extra=extra, log_likelihood=ll,
               aic=2 * k - 2 * ll, starts=len(points),
               agreeing=int(sum(abs(r.fun - best.fun) <= 0.01 for r in results)),
               converged=bool(best.success), evaluations=runs[0])


def _number(text: str) -> float:
    try:
        return float(text)
    except ValueError:
        return math.nan
