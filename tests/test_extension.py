"""A growth form and a functional response added through the public tables, as DEVELOPERS.md
shows: one class each, registered, and then usable by every part of the tool (the scenario,
the ODE solver, demographic noise, equilibria, the report).

The toy forms restate published ones: the logistic (Verhulst 1838, from memory) written as
births r n minus deaths r n²/K, and the Holling type II response (Holling 1959, Can. Entomol.
91:385) written as a n/(1 + a h n). So besides being consistency tests of the plumbing, the
runs must agree with the built-in logistic and Holling type II runs.
"""

from __future__ import annotations

import numpy as np
import pytest

from conftest import grid_study, write_grid_file
from trophoscape.model import dynamics
from trophoscape.model.dynamics import (GrowthForm, Response, interior_equilibrium,
                                        register_growth_form, register_response)


class SplitLogistic(GrowthForm):
    """Logistic growth as births ``r n`` minus deaths ``r n²/K``."""

    name = "split_logistic"
    needs = ("growth_rate", "capacity")
    words = "split-logistic"
    closed_form_equilibrium = True
    positive = ("capacity",)

    @staticmethod
    def value(n, q):
        return q["growth_rate"] * n - q["growth_rate"] * n * n / q["capacity"]

    @staticmethod
    def dn(n, q):
        return q["growth_rate"] - 2.0 * q["growth_rate"] * n / q["capacity"]

    @staticmethod
    def split(n, q):
        return q["growth_rate"] * n, q["growth_rate"] * n * n / q["capacity"]

    @staticmethod
    def prey_order(x):
        return 2.0 + 1.0 / (x - 1.0)  # deaths need two prey (Cao, Gillespie & Petzold 2006)


class SaturatingII(Response):
    """Holling type II, written as ``a n / (1 + a h n)`` with its own derivative."""

    name = "saturating_two"
    needs = ("attack_rate", "handling_time")
    words = "saturating (type II, restated)"

    @staticmethod
    def value(n, p, q):
        a, h = q["attack_rate"], q["handling_time"]
        return a * n / (1.0 + a * h * n)

    @staticmethod
    def dn(n, p, q):
        a, h = q["attack_rate"], q["handling_time"]
        return a / (1.0 + a * h * n) ** 2

    @staticmethod
    def equilibrium_prey(q):
        a, h, e, m = q["attack_rate"], q["handling_time"], q["conversion"], q["mortality"]
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(e - m * h > 0, m / (a * (e - m * h)), np.nan)


@pytest.fixture
def toys():
    register_growth_form(SplitLogistic)
    register_response(SaturatingII)
    yield
    dynamics.GROWTH_FORMS.pop(SplitLogistic.name)
    dynamics.RESPONSES.pop(SaturatingII.name)


@pytest.fixture
def grid(tmp_path):
    return write_grid_file(tmp_path)


SHARED = dict(prey={"capacity_density": 100.0}, predator={"initial_density": 2.0})


def _study(grid, growth, response, **extra):
    sections = {k: dict(v) for k, v in SHARED.items()}
    sections["prey"]["growth"] = growth
    sections["predation"] = {"response": response}
    for k, v in extra.items():
        sections.setdefault(k, {}).update(v)
    return grid_study(grid, duration=10.0, **sections)


def test_registered_forms_are_scenario_choices(toys, grid):
    study = _study(grid, "split_logistic", "saturating_two")
    assert study.system.model.growth_form is SplitLogistic
    assert study.system.model.functional_response is SaturatingII


def test_a_registered_form_needs_the_parts_the_tool_uses():
    class Bare(GrowthForm):  # exponential growth without its birth/death split
        name = "bare"
        needs = ("growth_rate",)
        value = staticmethod(dynamics.Exponential.value)
        dn = staticmethod(dynamics.Exponential.dn)

    with pytest.raises(TypeError, match="split"):
        register_growth_form(Bare)
    assert "bare" not in dynamics.GROWTH_FORMS

    class Unknown(SplitLogistic):
        name = "unknown_parameter"
        needs = ("growth_rate", "no_such_rate")

    with pytest.raises(ValueError, match="no_such_rate"):
        register_growth_form(Unknown)

    class Taken(SplitLogistic):
        name = "logistic"

    with pytest.raises(ValueError, match="is taken"):
        register_growth_form(Taken)
    assert dynamics.GROWTH_FORMS["logistic"] is dynamics.Logistic


def test_deterministic_runs_equal_the_built_in_forms(toys, grid):
    # consistency test: the restated forms give the built-in logistic / Holling II run
    import trophoscape as ts

    toy = ts.run_study(_study(grid, "split_logistic", "saturating_two"))
    ref = ts.run_study(_study(grid, "logistic", "holling2"))
    for s in ("prey", "predator"):
        np.testing.assert_allclose(toy.trajectory.data[s].values,
                                   ref.trajectory.data[s].values, rtol=1e-5, atol=1e-6)
    for col in ("prey_persists", "predator_persists"):
        assert toy.patches[col].equals(ref.patches[col])


def test_the_equilibrium_comes_from_the_classes(toys, grid):
    # Rosenzweig & MacArthur (1963, Am. Nat. 97:209, from memory): n* = m / (a (e - m h))
    toy = _study(grid, "split_logistic", "saturating_two").system.model
    ref = _study(grid, "logistic", "holling2").system.model
    n_toy, p_toy = interior_equilibrium(toy)
    n_ref, p_ref = interior_equilibrium(ref)
    np.testing.assert_allclose(n_toy, n_ref, rtol=1e-12)
    np.testing.assert_allclose(p_toy, p_ref, rtol=1e-12)
    assert np.all(np.isfinite(n_toy))


def test_demographic_noise_uses_the_birth_death_split(toys, grid):
    # the event-based engine draws births and deaths from the class's split: a run of the
    # toy keeps whole individuals, and its prey stay near the same mean as the built-in's
    import trophoscape as ts

    extra = {"noise": {"demographic": True}, "run": {"seed": 7}}
    toy = ts.run_study(_study(grid, "split_logistic", "saturating_two", **extra))
    ref = ts.run_study(_study(grid, "logistic", "holling2", **extra))
    prey = toy.trajectory.data["prey"].values
    assert np.all(prey >= 0) and np.all(prey == np.round(prey))
    late = slice(len(prey) // 2, None)
    assert prey[late].mean() == pytest.approx(ref.trajectory.data["prey"].values[late].mean(),
                                              rel=0.2)


def test_the_report_describes_the_forms_in_their_own_words(toys, grid, tmp_path):
    import trophoscape as ts

    result = ts.run_study(_study(grid, "split_logistic", "saturating_two"))
    ts.write_run(result, tmp_path / "out")
    report = (tmp_path / "out" / "report.html").read_text(encoding="utf-8")
    assert "split-logistic form" in report
    assert "saturating (type II, restated) response" in report
