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
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError, RunError
from ..model.system import SPECIES

__all__ = ["Counts", "read_counts", "expected_counts", "log_likelihood", "with_rates",
           "Fit", "fit_counts", "searched_study"]

#: The columns of a counts table, in order.
COUNT_COLUMNS = ("patch_id", "time", "species", "count")


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
    except FileNotFoundError:
        raise InputError("the counts table does not exist; check the path", file=path) from None
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise InputError(f"cannot be read as a CSV table ({exc}); expected {expected}",
                         file=path) from None
    rows = [r for r in rows if any(cell.strip() for cell in r)]
    if not rows:
        raise InputError(f"the file is empty; write a header row with {expected}", file=path)
    header = [c.strip() for c in rows[0]]
    for column in COUNT_COLUMNS:
        if header.count(column) > 1:
            raise InputError(f"the table has {header.count(column)} {column!r} columns; keep "
                             "one", file=path, field=column)
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
    species_ok = np.isin(cells["species"], SPECIES)
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
        raise InputError(f"counts this patch, time and species again (as feature {first}); "
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
    values = np.stack([traj.data[s].values for s in SPECIES])
    return detection * values[counts.species, rows, counts.patch]


#: Sections whose numeric keys a fit can estimate (the model's); others set the computation
#: (run), or do not enter the deterministic runs a fit compares with counts.
FITTABLE_SECTIONS = ("prey", "predator", "predation", "dispersal")


def _refuse_structure(key, **where) -> None:
    """Refuse a key that shapes the patches or the network (which a fit keeps)."""
    from .study import STRUCTURE_KEYS, STRUCTURE_SECTIONS

    if key in STRUCTURE_KEYS or key.split(".", 1)[0] in STRUCTURE_SECTIONS:
        raise InputError(f"{key} shapes the patches or the network, which a fit keeps as "
                         "they are; estimate rates and densities instead", **where)


def _refuse_unfittable(keys, where) -> None:
    for key in keys:
        section = key.split(".", 1)[0]
        _refuse_structure(key, file=where, field="fit.estimate")
        if section not in FITTABLE_SECTIONS:
            raise InputError(f"{key} is not a value of the model (a fit estimates keys of "
                             f"[{'], ['.join(FITTABLE_SECTIONS)}]); estimate rates and "
                             "densities instead", file=where, field="fit.estimate")


def with_rates(study, changes: dict):
    """The study with some scenario values changed (``{"prey.growth_rate": 1.3}``), its
    landscape and network kept: rates, densities, emigration, kernel scales, survival —
    anything but the keys that shape the network or the patches
    (:data:`trophoscape.workflows.study.STRUCTURE_KEYS`), which a fit cannot vary."""
    from .study import assemble_study

    for key in changes:
        _refuse_structure(key, field=key)
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


#: Signed-root deviance at a 95 % profile-likelihood bound: sqrt of the 0.95 quantile of
#: chi-squared with one degree of freedom (3.8415; Wilks 1938, Ann. Math. Stat. 9:60).
_ROOT95 = 1.959963984540054
#: How far (in log-value) starting points are spread around the scenario's values: within a
#: factor of 3 either way.
_START_SPREAD = math.log(3.0)
#: Correlation of two estimates (log-values) above which they are reported as not
#: separately identifiable.
_CORRELATED = 0.95
#: Search range of the negative binomial's dispersion.
_DISPERSION_RANGE = (1e-3, 1e4)
#: Expected counts are floored here in the search only (an extinct patch with counts has
#: no likelihood; the floor gives the search a slope out of it).
_FLOOR = 1e-6


@dataclass(frozen=True)
class Fit:
    """A maximum-likelihood fit (:func:`fit_counts`).

    Attributes
    ----------
    estimates : dict
        Each estimated scenario key → its estimate.
    low, high : dict
        Each key → the ends of its 95 % profile-likelihood interval (NaN when intervals were
        not asked for); an end at the key's bound when the likelihood does not fall by
        1.92 within the bounds (see ``open_ends``).
    open_ends : dict
        Each key → the ends (``"low"``, ``"high"``) where the interval reached the bound.
    bounds : dict
        Each key → ``(low, high)``, the range searched (the given bounds, or the default
        range narrowed to what the key accepts).
    observation : str
    extras : dict
        Per species with counts (``"prey"``, ``"predator"``): the observation model's sd
        (lognormal) or dispersion (negative binomial); empty for Poisson.
    log_likelihood : float
        The sum over the counts of their log densities at the estimates.
    aic : float
        ``2 k − 2 log L``, ``k`` counting every estimated quantity (sd or dispersion too).
    n_counts : int
    starts : int
        Starting points tried.
    agreeing : int
        Starts that ended within 0.01 of the best log-likelihood.
    converged : bool
        The best start's last search stopped on its tolerances, not on its run limit.
    evaluations : int
        Model runs used, intervals included.
    correlation : ndarray
        Correlations of the estimates (log-values), from the curvature of the likelihood.
    standard_error : dict
        Each key → the standard error of the log of its estimate, from the same curvature.
    profiles : dict
        Each key → ``(values, log_likelihoods)`` of the profile points computed.
    warnings : list of str
        Parameters not identifiable from the counts, and other cautions.
    expected : ndarray
        The fitted expected counts, one per row of the counts.
    """

    estimates: dict
    low: dict
    high: dict
    open_ends: dict
    bounds: dict
    observation: str
    extras: dict
    log_likelihood: float
    aic: float
    n_counts: int
    starts: int
    agreeing: int
    converged: bool
    evaluations: int
    correlation: np.ndarray
    standard_error: dict
    profiles: dict
    warnings: list
    expected: np.ndarray


#: The fit a forked worker computes runs for, while a pool works on it.
_JOB = None


def _run_in_worker(theta):
    return _JOB.expected(theta)


class _Likelihood:
    """The log-likelihood of counts as a function of the log-values of estimated keys.

    Each species' sd (lognormal) or dispersion (negative binomial) is set to its best value
    given the expected counts. For the searches the counts are also given as deviance
    residuals ``e`` with ``Σ e² = −2 (log L − log L_saturated)`` at fixed sd or dispersion,
    so that scipy's least-squares search, which uses the curvature ``JᵀJ``, maximises the
    likelihood.
    """

    def __init__(self, study, counts, keys, observation, detection, lo, hi, workers):
        self.study, self.counts, self.keys = study, counts, list(keys)
        self.observation, self.detection = observation, float(detection)
        self.lo, self.hi = lo, hi
        self.species = [s for s in (0, 1) if np.any(counts.species == s)]
        self.rows = {s: counts.species == s for s in self.species}
        self.runs = 0
        self.workers = workers
        self.pool = None
        rtol = float(study.scenario["run.rtol"])
        #: forward-difference step in log-values: about the square root of the runs' noise
        self.step = float(np.clip(math.sqrt(rtol), 1e-6, 1e-3))

    # -- runs -----------------------------------------------------------------------
    def expected(self, theta):
        """Expected counts at log-values ``theta`` (None where the model cannot run)."""
        values = dict(zip(self.keys, np.exp(theta).tolist()))
        try:
            return expected_counts(with_rates(self.study, values), self.counts,
                                   detection=self.detection)
        except (RunError, InputError):
            return None

    def expected_many(self, thetas):
        self.runs += len(thetas)
        if self.pool is None or len(thetas) == 1:
            return [self.expected(t) for t in thetas]
        return list(self.pool.map(_run_in_worker, thetas))

    def __enter__(self):
        import multiprocessing as mp

        workers = self.workers
        if workers is None:
            from .tasks import default_workers

            workers = default_workers()
        workers = min(int(workers), len(self.keys))
        if (workers > 1 and "fork" in mp.get_all_start_methods()
                and mp.parent_process() is None):
            from concurrent.futures import ProcessPoolExecutor

            from .tasks import init_worker_process

            global _JOB
            _JOB = self
            self.pool = ProcessPoolExecutor(workers, mp_context=mp.get_context("fork"),
                                            initializer=init_worker_process,
                                            initargs=(os.getpid(),))
        return self

    def __exit__(self, *exc):
        global _JOB
        if self.pool is not None:
            from .tasks import _stop_pool

            _stop_pool(self.pool)
            self.pool = None
        _JOB = None
        return False

    # -- the observation model ---------------------------------------------------------
    def best_extras(self, mu) -> dict:
        """Each counted species' sd or dispersion that maximises the likelihood at ``mu``."""
        from scipy.optimize import minimize_scalar

        from ..analysis.observation import negative_binomial_log_pmf

        y = self.counts.count
        out = {}
        for s in self.species:
            rows = self.rows[s]
            m = np.maximum(mu[rows], _FLOOR)
            if self.observation == "lognormal":
                r = np.log(y[rows]) - np.log(m)
                out[s] = max(float(np.sqrt(np.mean(r * r))), 1e-9)
            elif self.observation == "negative_binomial":
                best = minimize_scalar(
                    lambda lk: -float(np.sum(negative_binomial_log_pmf(y[rows], m,
                                                                       math.exp(lk)))),
                    bounds=tuple(math.log(v) for v in _DISPERSION_RANGE), method="bounded",
                    options={"xatol": 1e-6})
                out[s] = float(math.exp(best.x))
        return out

    def extra_array(self, extras):
        if not extras:
            return None
        e = np.ones(self.counts.n)
        for s, v in extras.items():
            e[self.rows[s]] = v
        return e

    def log_likelihood(self, mu, extras) -> float:
        from ..analysis.observation import log_density

        if mu is None:
            return -math.inf
        ll = float(np.sum(log_density(self.observation, self.counts.count, mu,
                                      self.extra_array(extras))))
        return ll if not math.isnan(ll) else -math.inf

    def residuals(self, mu, extras) -> np.ndarray:
        from scipy.special import kl_div

        y = self.counts.count
        m = np.maximum(mu, _FLOOR)
        if self.observation == "lognormal":
            return (np.log(y) - np.log(m)) / self.extra_array(extras)
        half = kl_div(y, m)
        if self.observation == "negative_binomial":
            k = self.extra_array(extras)
            half = half - kl_div(y + k, m + k)
        return np.sign(y - m) * np.sqrt(2.0 * np.maximum(half, 0.0))

    # -- the searches ------------------------------------------------------------------
    def differences(self, theta, free, extras, f0) -> np.ndarray:
        """Forward differences of the residuals ``f0`` (at ``theta``) in each free
        log-value (backward at the upper bound; a column of 0 where the run fails)."""
        index = np.flatnonzero(free)
        h = np.where(theta[index] + self.step <= self.hi[index], self.step, -self.step)
        trials = []
        for j, step in zip(index, h):
            t = theta.copy()
            t[j] += step
            trials.append(t)
        cols = [np.zeros_like(f0) if m is None else (self.residuals(m, extras) - f0) / step
                for step, m in zip(h, self.expected_many(trials))]
        return np.column_stack(cols)

    def maximise(self, theta0, free, *, max_rounds: int = 20):
        """Maximise over the log-values ``free`` (a boolean mask) from ``theta0``, the
        others held; returns ``(theta, mu, extras, log L, converged, jacobian)``."""
        from scipy.optimize import least_squares

        theta = np.array(theta0, dtype=float)
        lo, hi = self.lo[free], self.hi[free]
        width = hi - lo
        theta[free] = np.clip(theta[free], lo + 1e-9 * width, hi - 1e-9 * width)
        (mu,) = self.expected_many([theta])
        if mu is None:
            return theta, None, {}, -math.inf, False, None
        extras = self.best_extras(mu)
        ll = self.log_likelihood(mu, extras)
        if not free.any():  # every value held: the likelihood there is all there is
            return theta, mu, extras, ll, True, None
        fails = np.full(self.counts.n, 1e3)
        converged, jac_last = False, None
        for _ in range(max_rounds):
            cache = {}

            def full(x):
                t = theta.copy()
                t[free] = x
                return t

            def fun(x, extras=extras, cache=cache):
                key = x.tobytes()
                if key not in cache:
                    (m,) = self.expected_many([full(x)])
                    cache.clear()
                    cache[key] = (fails if m is None else self.residuals(m, extras), m)
                return cache[key][0]

            def jac(x, extras=extras, cache=cache):
                return self.differences(full(x), free, extras, fun(x))

            res = least_squares(fun, theta[free], jac=jac, bounds=(lo, hi), method="trf",
                                x_scale="jac", ftol=1e-7, xtol=1e-7, gtol=1e-7,
                                max_nfev=60)
            key = res.x.tobytes()
            m = cache[key][1] if key in cache else self.expected_many([full(res.x)])[0]
            if m is None:
                break
            converged, jac_last = res.status > 0, res.jac
            theta[free] = res.x
            mu = m
            new_extras = self.best_extras(mu)
            new_ll = self.log_likelihood(mu, new_extras)
            gain = new_ll - ll
            extras, ll = new_extras, new_ll
            if not self.species or self.observation == "poisson" or abs(gain) < 1e-4:
                break
        return theta, mu, extras, ll, converged, jac_last

    def profile(self, j, theta_hat, ll_hat, cov):
        """The profile of parameter ``j`` out to where the log-likelihood has fallen by
        1.92 (a 95 % interval) on each side: ``(low, high, open ends, points, best point
        seen)``. An end is open (listed in ``open ends``) where the fall is not reached:
        the estimate sits on its bound, or the likelihood stays higher up to the bound or up
        to where the model cannot run; the end is then that place."""
        free = np.ones(theta_hat.size, dtype=bool)
        free[j] = False
        usable = np.isfinite(cov[j, j]) and cov[j, j] > 0 and np.all(np.isfinite(cov[:, j]))
        se = math.sqrt(cov[j, j]) if usable else 0.1
        points = [(float(theta_hat[j]), ll_hat)]
        ends, open_ends, better = [], [], None
        for side, limit in ((-1, self.lo[j]), (1, self.hi[j])):
            name = "low" if side < 0 else "high"
            room = abs(limit - theta_hat[j])
            seen = [(0.0, 0.0)]  # (distance, signed root) on this side
            end, step = None, min(_ROOT95 * se, room)
            for _ in range(12):
                if room <= 1e-9 or step <= 1e-12:
                    end = room
                    open_ends.append(name)
                    break
                x = theta_hat[j] + side * step
                start = (theta_hat + cov[:, j] / cov[j, j] * (x - theta_hat[j]) if usable
                         else theta_hat.copy())
                start[j] = x
                t, _, _, ll, _, _ = self.maximise(start, free)
                if not np.isfinite(ll):  # the model cannot run here: its edge is the bound
                    room = step
                    step *= 0.5
                    continue
                if ll > ll_hat + 0.01 and (better is None or ll > better[1]):
                    better = (t, ll)
                r = math.sqrt(max(0.0, 2.0 * (ll_hat - ll)))
                points.append((float(x), ll))
                seen.append((step, r))
                if r < _ROOT95 and step >= room * (1 - 1e-9):
                    end = room
                    open_ends.append(name)
                    break
                if abs(r - _ROOT95) < 0.1:  # the signed root is about linear here
                    end = min(step * _ROOT95 / r, room)
                    break
                factor = _ROOT95 / r if r > 0 else 4.0
                step = min(step * float(np.clip(factor, 0.25, 4.0)), room)
            if end is None:  # between the last point below 1.96 and the first above
                seen.sort()
                below = [p for p in seen if p[1] < _ROOT95]
                above = [p for p in seen if p[1] >= _ROOT95]
                if above:
                    (d0, r0), (d1, r1) = below[-1], above[0]
                    end = d0 + (d1 - d0) * (_ROOT95 - r0) / (r1 - r0)
                else:  # never reached: as far as it was followed, and open
                    end = seen[-1][0]
                    open_ends.append(name)
            ends.append(theta_hat[j] + side * end)
        points.sort()
        return ends[0], ends[1], open_ends, points, better


def searched_study(study, values=None):
    """The study as a fit's runs see it: tolerances a hundred times tighter than the
    scenario's, no removals below the extinction threshold (:func:`fit_counts`), and
    ``values`` (key → value) in place."""
    from dataclasses import replace

    sc = study.scenario
    tight = sc.with_values(run__rtol=sc["run.rtol"] / 100.0, run__atol=sc["run.atol"] / 100.0,
                           run__extinction_abundance=0.0)
    study = replace(study, scenario=tight)
    return with_rates(study, values) if values else study


def fit_counts(study, counts: Counts, estimate, *, observation: str = "lognormal",
               bounds=None, detection: float = 1.0, starts: int = 4, seed: int = 1,
               intervals: bool = True, workers=None, progress: bool = False) -> Fit:
    """Maximum-likelihood estimates of some scenario values from survey counts, with 95 %
    profile-likelihood intervals.

    The values are searched in logarithms within ``bounds`` (key → (low, high); default a
    hundredth to a hundred times the scenario's value) from ``starts`` points: the
    scenario's values, then points drawn (``seed``) within a factor of 3 of them. Each
    search is scipy's bounded least squares (``least_squares``, trust-region reflective)
    on the counts' deviance residuals, with gradients by forward differences of the
    coupled system's runs, computed on ``workers`` processes (default all cores; results do
    not depend on it). Each species' lognormal sd or negative-binomial dispersion is set
    to its best value in turn with the rates until the likelihood stops rising. The runs
    use tolerances a hundred times tighter than the scenario's, so the likelihood is smooth
    enough for differences, and without removing populations that fall below
    ``run.extinction_abundance``: a removal makes the expected counts jump as the rates
    change, and a likelihood with jumps cannot be searched by its slope. The fit fits the
    deterministic model's smooth course; a warning says when removals, applied at the
    estimates, would lower the log-likelihood by more than 1.

    With ``intervals``, each value is profiled: held at values stepping away from its
    estimate, the others searched again, until the log-likelihood has fallen by
    χ²₁(0.95)/2 = 1.92 (Wilks 1938) or the bound is reached (the interval then ends at the
    bound and the value is reported as not identifiable). Pairs of estimates correlated
    above 0.95 (from the curvature of the likelihood) are reported too.

    Raises
    ------
    InputError
        A key given per patch, a value not above 0, or fewer counts than estimated
        quantities.
    RunError
        No start could be run.
    """
    from dataclasses import replace

    from ..analysis.observation import OBSERVATION_MODELS

    if observation not in OBSERVATION_MODELS:
        raise ValueError(f"unknown observation model {observation!r}")
    keys = list(estimate)
    if not keys:
        raise InputError("nothing to estimate; list scenario keys in [fit] estimate, e.g. "
                         "[\"prey.growth_rate\"]", field="fit.estimate")
    from ..scenario import FieldRef

    where = study.scenario.path
    _refuse_unfittable(keys, where)
    for k in keys:
        value = study.scenario[k]
        if isinstance(value, FieldRef):
            raise InputError(f"{k} is taken per patch from an attribute in the scenario; a "
                             "fit estimates one value for all patches: give it a number",
                             file=where, field=k)
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise InputError(f"{k} is {value!r} in the scenario; a fit estimates a number: "
                             "give one to start from", file=where, field=k)
    base = np.array([float(study.scenario[k]) for k in keys])
    if np.any(base <= 0):
        k = keys[int(np.argmax(base <= 0))]
        raise InputError(f"{k} is {study.scenario[k]!r} in the scenario; an estimated value "
                         "must start above 0", file=where, field=k)
    n_species = len(set(counts.species.tolist()))
    n_extra = n_species if OBSERVATION_MODELS[observation] else 0
    if counts.n < len(keys) + n_extra:
        raise InputError(f"the table has {counts.n} count{'s' * (counts.n != 1)}, fewer "
                         f"than the {len(keys) + n_extra} quantities the fit estimates ({len(keys)} "
                         f"scenario value{'s' * (len(keys) != 1)} and {n_extra} observation "
                         f"{OBSERVATION_MODELS[observation] or 'parameter'}"
                         f"{'s' * (n_extra != 1)}); add counts or estimate fewer values",
                         file=counts.path, field="count")
    per_species = np.bincount(counts.species, minlength=2)
    if n_extra:
        thin = [(s, int(per_species[s])) for s in (0, 1) if 0 < per_species[s] < 3]
        if thin:
            name = SPECIES[thin[0][0]]
            raise InputError(f"the table has {thin[0][1]} count(s) of {name}; the {observation} "
                             f"model estimates a {OBSERVATION_MODELS[observation]} for each "
                             "species counted, which needs at least 3 counts of it: add counts "
                             f"or leave the {name} out", file=counts.path, field="species")
    bounds = dict(bounds or {})
    stray = sorted(set(bounds) - set(keys))
    if stray:
        raise InputError(f"bounds are given for {stray[0]}, which is not estimated; add it to "
                         "fit.estimate or remove its bounds", file=where, field="fit.bounds")
    searched = {}
    for k, b in zip(keys, base):
        a_, b_ = bounds.get(k, (b / 100.0, b * 100.0))
        if k not in bounds:  # the default range, within what the key accepts
            a_, b_ = _valid_range(k, b, a_, b_)
        searched[k] = (float(a_), float(b_))
    lo = np.log([searched[k][0] for k in keys])
    hi = np.log([searched[k][1] for k in keys])
    scenario = study.scenario
    study = searched_study(study)
    tight = study.scenario
    rng = np.random.default_rng(seed)
    first = np.clip(np.log(base), lo, hi)
    points = [first] + [np.clip(first + rng.uniform(-_START_SPREAD, _START_SPREAD, first.size),
                                lo, hi) for _ in range(max(1, starts) - 1)]
    free = np.ones(len(keys), dtype=bool)
    from tqdm.auto import tqdm

    bar = tqdm(total=len(points) + (len(keys) if intervals else 0), disable=not progress,
               desc="fit: starts, then intervals", unit="search", delay=1.0)
    with bar, _Likelihood(study, counts, keys, observation, detection, lo, hi,
                          workers) as like:
        _refuse_impossible(like, first)
        results = []
        for x0 in points:
            results.append(like.maximise(x0, free))
            bar.update(1)
        best = max(results, key=lambda r: r[3])
        theta, mu, extras, ll, converged, _ = best
        if mu is None or not np.isfinite(ll):
            raise RunError("no starting point gave a run the counts are possible under; "
                           "check the scenario's values and bounds of the estimated keys")
        for attempt in range(2):
            warnings = []
            cov, sd, corr = _curvature(like, theta, extras, keys, warnings)
            low, high, open_ends, profiles, better = {}, {}, {}, {}, None
            for j, k in enumerate(keys):
                if not intervals:
                    low[k] = high[k] = math.nan
                    open_ends[k] = []
                    continue
                a, b, ends, pts, higher = like.profile(j, theta, ll, cov)
                bar.update(1)
                low[k], high[k], open_ends[k] = float(np.exp(a)), float(np.exp(b)), ends
                profiles[k] = (np.exp([p[0] for p in pts]), np.array([p[1] for p in pts]))
                if higher is not None and (better is None or higher[1] > better[1]):
                    better = higher
            if better is None or attempt == 1:
                break
            # a profile found a higher likelihood: search again from there, then profile
            again = like.maximise(better[0], free)
            if again[1] is None or not again[3] > ll:
                break
            theta, mu, extras, ll, converged, _ = again
            bar.total += len(keys)
        if better is not None:
            warnings.append(f"a profile found a higher likelihood ({better[1]:.6g} against "
                            f"{ll:.6g}) even after searching again from it: the estimates may "
                            "be a local optimum; try more starts or narrower bounds")
        values = np.exp(theta)
        for j, k in enumerate(keys):
            on = [n for n, edge in (("lower", lo[j]), ("upper", hi[j]))
                  if abs(theta[j] - edge) <= 1e-6]
            if on:
                warnings.append(f"{k} is estimated on its {on[0]} bound ({values[j]:.4g}): "
                                "the counts ask for a value beyond it; widen fit.bounds if "
                                "such values are possible")
            elif open_ends[k]:
                warnings.append(f"{k} is not identifiable from these counts: the likelihood "
                                "hardly changes out to its " + " and ".join(open_ends[k])
                                + " bound (the interval ends there)")
        for i in range(len(keys)):
            for j in range(i + 1, len(keys)):
                if abs(corr[i, j]) > _CORRELATED:
                    warnings.append(f"{keys[i]} and {keys[j]} are not separately identifiable "
                                    f"from these counts (correlation {corr[i, j]:+.2f}): "
                                    "their ratio or product is determined, not each")
        if observation == "negative_binomial":
            for s, k_ in sorted(extras.items()):
                if k_ <= _DISPERSION_RANGE[0] * 1.01:
                    warnings.append(f"the {SPECIES[s]} counts scatter so widely that their "
                                    f"dispersion is at its lowest ({k_:.3g}): they hardly "
                                    "weigh in the fit; check them")
                elif k_ >= _DISPERSION_RANGE[1] / 1.01:
                    warnings.append(f"the {SPECIES[s]} counts scatter no more than Poisson "
                                    f"counts (dispersion {k_:.3g}, the highest searched): the "
                                    "poisson observation model suits them")
        threshold = float(scenario["run.extinction_abundance"])
        if threshold > 0:
            # the searches run without removals (they make the expected counts jump with
            # the rates); say so where removals would change the fit at the estimates
            removing = replace(study, scenario=tight.with_values(
                run__extinction_abundance=threshold))
            like.runs += 1
            with_removals = like.log_likelihood(
                expected_counts(with_rates(removing, dict(zip(keys, values.tolist()))),
                                counts, detection=detection), extras)
            if not with_removals >= ll - 1.0:
                warnings.append(
                    "at the estimates some populations fall below the extinction threshold "
                    f"({threshold:g}), which the fit's runs do not apply and other commands "
                    f"do: with removals the log-likelihood is {with_removals:.6g} against "
                    f"{ll:.6g}; treat the fit with care, or lower run.extinction_abundance")
        runs = like.runs
    k_total = len(keys) + len(extras)
    return Fit(estimates=dict(zip(keys, values.tolist())), low=low, high=high,
               open_ends=open_ends,
               bounds=searched,
               observation=observation,
               extras={SPECIES[s]: v for s, v in sorted(extras.items())}, log_likelihood=ll,
               aic=2 * k_total - 2 * ll, n_counts=counts.n, starts=len(points),
               agreeing=int(sum(abs(r[3] - ll) <= 0.01 for r in results)),
               converged=bool(converged), evaluations=runs, correlation=corr,
               standard_error=dict(zip(keys, sd.tolist())), profiles=profiles,
               warnings=warnings, expected=mu)


def _valid_range(key, value, low, high):
    """``(low, high)`` narrowed to the values the scenario accepts for ``key`` (such as a
    survival of at most 1), found by bisection in logarithms from ``value``, which it
    accepts."""
    from ..scenario import SCHEMA

    section, _, name = key.partition(".")
    check = SCHEMA[section][name].check

    def edge(far):
        if check(far) is None:
            return far
        inside, outside = math.log(value), math.log(far)
        for _ in range(60):
            mid = 0.5 * (inside + outside)
            if check(math.exp(mid)) is None:
                inside = mid
            else:
                outside = mid
        return math.exp(inside)

    return edge(low), edge(high)


def _refuse_impossible(like, theta) -> None:
    """Refuse counts the model cannot produce at the scenario's values, whatever the rates:
    a positive count where the expected count is 0 (a species absent from the start)."""
    (mu,) = like.expected_many([theta])
    if mu is None:
        return
    y = like.counts.count
    impossible = (mu <= 0) & ((y > 0) | (like.observation == "lognormal"))
    if impossible.any():
        r = int(np.flatnonzero(impossible)[0])
        raise InputError(f"the model expects no {SPECIES[int(like.counts.species[r])]} here "
                         f"(it is absent from the start), so a count of {y[r]:g} is "
                         "impossible; give the species an initial density above 0, or leave "
                         "the row out", file=like.counts.path, feature=r, field="count")


def _curvature(like, theta, extras, keys, warnings):
    """Covariance, standard errors and correlations of the log-values from the curvature
    ``JᵀJ`` of the deviance at ``theta``; a direction it does not curve in (the counts do
    not determine it) gives its values an infinite standard error and a warning."""
    free = np.ones(theta.size, dtype=bool)
    (mu,) = like.expected_many([theta])
    jac = like.differences(theta, free, extras, like.residuals(mu, extras))
    h = jac.T @ jac
    w, v = np.linalg.eigh(h)
    flat = w <= 1e-10 * max(float(w.max()), 1e-300)
    cov = np.linalg.pinv(h)
    sd = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    if flat.any():
        involved = np.abs(v[:, flat]).max(axis=1) > 0.1
        sd[involved] = np.inf
        warnings.append("the counts do not determine " + ", ".join(
            k for k, i in zip(keys, involved) if i) + " (the likelihood does not change "
            "along some combination of them)")
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cov / np.outer(sd, sd)
    undetermined = ~np.isfinite(sd) | (sd == 0)
    corr[undetermined, :] = np.nan
    corr[:, undetermined] = np.nan
    corr[~np.isfinite(corr)] = np.nan
    np.fill_diagonal(corr, 1.0)
    return cov, sd, corr


def _number(text: str) -> float:
    try:
        return float(text)
    except ValueError:
        return math.nan
