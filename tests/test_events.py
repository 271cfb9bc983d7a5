"""Demographic noise (event-based runs): the tau-leaping engine and whole-model runs against
closed forms and exact stochastic simulation.

Statistical checks use fixed seeds; their tolerances are ``Z`` standard errors of the
replicates they use (standard errors from the replicates themselves where the replicates
are independent), unless a range is stated as the requirement.
"""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.stats as st

import trophoscape.integrate.events as events
from conftest import make_model, make_system
from trophoscape.model.dynamics import LocalModel
from trophoscape.integrate.events import Channels, EventStats, advance_events, event_channels
from trophoscape.integrate.noise import NoiseModel
from trophoscape.integrate.replicates import stack_state, stack_system
from trophoscape.integrate.ode import simulate

#: Standard errors allowed in a statistical check (two-sided, about 0.3 % by chance each).
Z = 3.0


def _spy(monkeypatch):
    """Record the EventStats of every advance_events call a whole-model run makes."""
    seen = []
    inner = events.advance_events

    def spy(*args, **kwargs):
        stats = kwargs.get("stats")
        if stats is not None and all(stats is not s for s in seen):
            seen.append(stats)
        return inner(*args, **kwargs)

    monkeypatch.setattr(events, "advance_events", spy)
    return seen


def _totals(seen):
    return (sum(s.leaps for s in seen), sum(s.exact_steps for s in seen))


def _unlinked(n, growth="logistic", area=1.0, **values):
    """n patches without links (independent replicates of one patch), prey only unless
    ``values`` give the predator something to eat."""
    model = make_model(n, growth=growth, **values)
    return make_system(model, area=np.full(n, area))


# ------------------------------------------------------------- leaping against theory
@pytest.mark.parametrize("census", [0.5, 2.0])
def test_logistic_prey_stationary_variance_is_the_capacity(census, monkeypatch):
    # births r N and deaths r N²/K: at N = K the drift has slope -r and the noise intensity
    # is 2 r K, so the linear-noise approximation gives the stationary variance 2rK/(2r) =
    # K (van Kampen 1981, Stochastic Processes in Physics and Chemistry; from memory); the
    # stationary mean is K - var/K = K - 1, since E[r N - r N²/K] = 0 (moment equation,
    # common practice). Through the whole model: 300 unlinked patches are independent
    # replicates; the census interval must not matter (it only cuts leaps).
    patches, cap, burn, span = 300, 10_000.0, 5.0, {0.5: 60.0, 2.0: 100.0}[census]
    system = _unlinked(patches, capacity=cap, attack_rate=0.0, growth_rate=1.0)
    noise = NoiseModel(centroids_km=np.c_[np.arange(patches, dtype=float), np.zeros(patches)],
                       seeds=[41], demographic=True)
    seen = _spy(monkeypatch)
    traj = simulate(system, np.r_[np.full(patches, cap), np.zeros(patches)],
                    duration=burn + span, census_interval=census, noise=noise)
    leaps, exact = _totals(seen)
    assert leaps > 0.99 * (leaps + exact)  # leaping is on: (almost) every step is a leap
    # and a leap carries many events: about 2 r K per patch and time unit happen
    assert leaps + exact < 2.0 * cap * patches * (burn + span) / 1_000
    prey = traj.data["prey"].sel(time=slice(burn + 1e-9, None)).values.astype(float)
    per_patch_var = ((prey - prey.mean()) ** 2).mean(axis=0) / cap  # independent patches
    ratio = per_patch_var.mean()
    se = per_patch_var.std(ddof=1) / np.sqrt(patches)
    assert 0.95 <= ratio <= 1.05  # the required band
    assert abs(ratio - 1.0) < Z * se, (ratio, se)
    per_patch_mean = prey.mean(axis=0)
    se_mean = per_patch_mean.std(ddof=1) / np.sqrt(patches)
    assert abs(per_patch_mean.mean() - (cap - 1.0)) < Z * se_mean


def _immigration_death(nu, mu, reps=1):
    """``reps`` independent copies of one species with immigration at rate nu and death
    mu x: channels for advance_events (immigration first, then deaths)."""
    eye = sp.identity(reps, dtype=np.int64, format="csr")

    def rates(x, which=None):
        a = np.concatenate([np.full(reps, float(nu)), mu * np.asarray(x, dtype=float)])
        return a if which is None else a[which]

    return Channels(rates=rates, change=sp.hstack([eye, -eye]),
                    consumer=np.r_[np.full(reps, -1), np.arange(reps)],
                    order=np.ones(reps))  # both channels first order (g = 1)


def _stationary_immigration_death(nu, mu, reps, seed, samples=4, **options):
    """Counts of ``reps`` copies at ``samples`` times 3/mu apart after a burn-in of 10/mu,
    started at nu/mu; returns (counts (samples, reps), stats, time leaped)."""
    chans = _immigration_death(nu, mu, reps)
    rng = np.random.default_rng(seed)
    stats = EventStats()
    x = np.full(reps, round(nu / mu), dtype=np.int64)
    x = advance_events(x, 0.0, 10.0 / mu, chans, rng, stats=stats, **options)
    out = []
    for _ in range(samples):
        x = advance_events(x, 0.0, 3.0 / mu, chans, rng, stats=stats, **options)
        out.append(x.copy())
    return np.array(out, dtype=float), stats, (10.0 + 3.0 * samples) / mu


def _variance_over_mean(counts, mean):
    """Mean-square deviation from ``mean`` over ``mean``, and its standard error from the
    independent copies (columns)."""
    per_copy = ((counts - mean) ** 2).mean(axis=0) / mean
    return per_copy.mean(), per_copy.std(ddof=1) / np.sqrt(counts.shape[1])


def test_immigration_death_stationary_variance_over_mean_at_nu_4000():
    # immigration nu and death mu x: stationary Poisson(nu/mu) (the M/M/inf queue; Kendall
    # 1948, Ann. Math. Stat. 19:1, from memory): variance/mean 1
    nu, mu, reps = 4_000.0, 1.0, 10_000
    counts, stats, _ = _stationary_immigration_death(nu, mu, reps, seed=12)
    assert stats.exact_steps == 0 and stats.leaps > 100  # leaping only
    ratio, se = _variance_over_mean(counts, nu / mu)
    assert 0.95 <= ratio <= 1.05  # the required band
    assert abs(ratio - 1.0) < Z * se, (ratio, se)
    assert abs(counts.mean() - nu / mu) < Z * np.sqrt(nu / mu / counts.size)
    # the check has teeth: with the 2006 leap condition alone (relaxation bound off) the
    # leaps outgrow the relaxation time 1/mu and the variance is inflated
    counts, stats, _ = _stationary_immigration_death(nu, mu, reps, seed=12, relaxation=None)
    loose, se = _variance_over_mean(counts, nu / mu)
    assert loose > 1.05 + Z * se, loose


@pytest.mark.parametrize("midpoint", [True, False])
def test_variance_excess_follows_the_leap_map_and_vanishes_as_the_tolerance_tightens(midpoint):
    # the leap map of immigration-death is linear: x' = x + Poisson(nu τ) - Poisson(mu τ
    # x_m), x_m = x with a midpoint leap's correction; deviations shrink by m = 1 - z +
    # z²/2 (midpoint) or 1 - z (first order), z = mu τ, and take on noise of variance
    # 2 nu τ, so the stationary variance/mean is 2z/(1 - m²) (stationary variance of a
    # linear AR(1) map; Box & Jenkins 1970, Time Series Analysis, from memory): about
    # 1 + z with midpoints, 1 + z/2 without. The relaxation bound sets z ≈ ε_r/2 here: the
    # excess must follow the map at every tolerance and shrink with it (results converge
    # as the tolerance tightens).
    nu, mu, reps = 4_000.0, 1.0, 10_000
    zs, excess = [], []
    for tol in (0.16, 0.08, 0.04):
        counts, stats, span = _stationary_immigration_death(
            nu, mu, reps, seed=13, relaxation=tol, midpoint=midpoint)
        z = mu * span / stats.leaps  # the mean leap, as the run took it
        m = 1.0 - z + z * z / 2.0 if midpoint else 1.0 - z
        predicted = 2.0 * z / (1.0 - m * m)
        ratio, se = _variance_over_mean(counts, nu / mu)
        assert abs(ratio - predicted) < Z * se, (tol, ratio, predicted, se)
        assert z <= tol / 2  # the bound held: z = mu τ <= ε_r mu x / σ² ≈ ε_r / 2
        zs.append(z)
        excess.append(ratio - 1.0)
    assert 3.8 < zs[0] / zs[-1] < 4.2  # leaps shrink in proportion to the tolerance
    assert excess[0] > excess[-1] > -Z * se  # and so does the excess, to 0


def _birth_death(b, d, x0, t_end, patches, seed, census, **kw):
    """A linear birth-death process (prey born at rate b, harvested at rate d per capita,
    no predator) in ``patches`` unlinked patches from ``x0`` each, through the whole model."""
    params = make_model(patches, growth="exponential", growth_rate=b, attack_rate=0.0).params
    params = {**params, "prey_harvest": np.full(patches, d)}
    system = make_system(LocalModel(growth="exponential", response="holling2", params=params))
    noise = NoiseModel(centroids_km=np.c_[np.arange(patches, dtype=float), np.zeros(patches)],
                       seeds=[seed], demographic=True)
    return simulate(system, np.r_[np.full(patches, float(x0)), np.zeros(patches)],
                    duration=t_end, census_interval=census, noise=noise, **kw)


def test_linear_birth_death_mean_and_variance_with_leaps(monkeypatch):
    # one patch, prey born at rate b and harvested at rate d per capita, no predator: a
    # linear birth-death process with mean x0 e^{(b-d)t} and variance
    # x0 (b+d)/(b-d) e^{(b-d)t} (e^{(b-d)t} - 1) (Bailey 1964, The Elements of Stochastic
    # Processes, from memory). 4,000 unlinked patches through the whole model, from x0 =
    # 5,000: every step leaps. A first-order leap would bias the mean by about
    # -(b-d)² τ t/2 (about 3 standard errors here); the midpoint leap removes it.
    b, d, x0, t_end, patches = 0.5, 0.8, 5_000.0, 2.0, 4_000
    seen = _spy(monkeypatch)
    traj = _birth_death(b, d, x0, t_end, patches, 5, 1.0)
    leaps, exact = _totals(seen)
    assert exact == 0 and leaps > 100
    got = traj.data["prey"].values[-1].astype(float)
    g = np.exp((b - d) * t_end)
    mean, var = x0 * g, x0 * (b + d) / (b - d) * g * (g - 1.0)
    assert abs(got.mean() - mean) < 2.0 * np.sqrt(var / patches), (got.mean(), mean)
    # sample variance: standard error var sqrt(2/(n-1)) for a near-normal law (x0 large)
    assert abs(got.var(ddof=1) / var - 1.0) < Z * np.sqrt(2.0 / (patches - 1))


def test_extinction_by_time_t_of_a_subcritical_birth_death_process(monkeypatch):
    # linear birth-death with b < d from x0: P(X_t = 0) = p0(t)^x0 with
    # p0(t) = d (e^{(b-d)t} - 1) / (b e^{(b-d)t} - d) (Bailey 1964, The Elements of
    # Stochastic Processes, from memory). 1,000 unlinked patches from x0 = 200 through the
    # whole model: populations leap down to the critical size, and the last individuals
    # go by critical events (at most one per leap) and exact steps.
    b, d, x0, t_end, patches = 0.5, 1.5, 200.0, 5.0, 1_000
    seen = _spy(monkeypatch)
    traj = _birth_death(b, d, x0, t_end, patches, 8, 0.5)
    leaps, exact = _totals(seen)
    assert leaps > 0.5 * (leaps + exact)  # most steps leap
    got = traj.data["prey"].values
    assert np.all(got == np.round(got))  # whole individuals
    g = np.exp((b - d) * t_end)
    p_ext = (d * (g - 1) / (b * g - d)) ** x0
    share = np.mean(got[-1] == 0)
    assert abs(share - p_ext) < Z * np.sqrt(p_ext * (1 - p_ext) / patches), (share, p_ext)
    # extinct stays extinct (no immigration): the share only grows over the census times
    assert np.all(np.diff((got == 0).mean(axis=1)) >= 0)


def test_immigration_death_small_mean_by_exact_steps():
    # started empty, the immigration-death process is Poisson with mean
    # (nu/mu)(1 - e^{-mu t}) at every t (Kendall 1948, Ann. Math. Stat. 19:1, from memory).
    # A mean of 8: critical channels and exact steps, no leap.
    nu, mu, reps = 4.0, 0.5, 400
    t_end = 20.0 / mu
    chans = _immigration_death(nu, mu)
    stats = EventStats()
    rng = np.random.default_rng(5)
    got = np.array([advance_events(np.zeros(1, np.int64), 0.0, t_end, chans, rng,
                                   stats=stats)[0] for _ in range(reps)], dtype=float)
    mean = nu / mu * (1 - np.exp(-mu * t_end))
    assert stats.exact_steps > 0 and stats.leaps == 0
    assert abs(got.mean() - mean) < Z * np.sqrt(mean / reps)
    lo, hi = st.chi2.ppf([0.0015, 0.9985], reps - 1) / (reps - 1)  # sample variance / var
    assert lo < got.var(ddof=1) / mean < hi


# ------------------------------------------ leaping against exact SSA, two patches
#: Two patches: logistic prey, Holling type II predators, both species dispersing both
#: ways at rate EPS with survival SURV (the rest die in transit). Per km², area 1.
R, K, A, H, E, M, EPS, SURV = 2.0, 600.0, 0.001, 0.1, 0.5, 0.2, 0.1, 0.9
START = np.array([250, 540, 380, 820])  # prey 0, prey 1, predator 0, predator 1
T_END, REPS = 1.5, 2_000

#: the 18 channels of the in-test SSA and their changes of (N0, N1, P0, P1)
_SSA_CHANGE = np.array([
    [1, 0, 0, 0], [0, 1, 0, 0],      # prey births r N
    [-1, 0, 0, 0], [0, -1, 0, 0],    # prey deaths r N²/K
    [-1, 0, 0, 0], [0, -1, 0, 0],    # prey eaten a N P / (1 + a h N)
    [0, 0, 1, 0], [0, 0, 0, 1],      # predator births e × eaten
    [0, 0, -1, 0], [0, 0, 0, -1],    # predator deaths m P
    [-1, 1, 0, 0], [1, -1, 0, 0],    # prey moves EPS SURV N
    [-1, 0, 0, 0], [0, -1, 0, 0],    # prey dies in transit EPS (1 - SURV) N
    [0, 0, -1, 1], [0, 0, 1, -1],    # predator moves
    [0, 0, -1, 0], [0, 0, 0, -1],    # predator dies in transit
]).T


def _ssa_two_patches(t_end, reps, rng):
    """Exact SSA (Gillespie 1977, J. Phys. Chem. 81:2340, direct method) of the two-patch
    network, written from the equations and run for all replicates at once (each replicate
    its own clock; one event each per pass until its clock passes t_end)."""
    x = np.repeat(START[:, None].astype(float), reps, axis=1)
    t = np.zeros(reps)
    a = np.empty((18, reps))
    going = np.ones(reps, dtype=bool)
    while going.any():
        n0, n1, p0, p1 = x
        for k, (n, p) in enumerate(((n0, p0), (n1, p1))):
            eaten = A * n * p / (1.0 + A * H * n)
            a[k], a[2 + k], a[4 + k] = R * n, R * n * n / K, eaten
            a[6 + k], a[8 + k] = E * eaten, M * p
        a[10], a[11], a[12], a[13] = EPS * SURV * n0, EPS * SURV * n1, \
            EPS * (1 - SURV) * n0, EPS * (1 - SURV) * n1
        a[14], a[15], a[16], a[17] = EPS * SURV * p0, EPS * SURV * p1, \
            EPS * (1 - SURV) * p0, EPS * (1 - SURV) * p1
        cum = np.cumsum(a, axis=0)
        t += rng.exponential(1.0 / cum[-1])
        going &= t <= t_end
        j = np.minimum((cum <= rng.random(reps) * cum[-1]).sum(axis=0), 17)
        x += _SSA_CHANGE[:, j] * going
    return x.T


@pytest.fixture(scope="module")
def exact_two_patches():
    return _ssa_two_patches(T_END, REPS, np.random.default_rng(2026))


def _leaped_two_patches(seed, **options):
    """The model's channels for REPS unlinked copies of the two-patch network, leaped to
    T_END; returns (N0, N1, P0, P1) per copy and the stats."""
    model = make_model(2, growth_rate=R, capacity=K, attack_rate=A, handling_time=H,
                       conversion=E, mortality=M)
    move = sp.csr_array(np.array([[-EPS, EPS * SURV], [EPS * SURV, -EPS]]))
    system = stack_system(make_system(model, prey_movement=move, predator_movement=move),
                          REPS)
    x = np.r_[np.tile(START[:2], REPS), np.tile(START[2:], REPS)].astype(np.int64)
    stats = EventStats()
    x = advance_events(x, 0.0, T_END, event_channels(system), np.random.default_rng(seed),
                       stats=stats, **options)
    n = 2 * REPS
    return np.column_stack([x[0:n:2], x[1:n:2], x[n::2], x[n + 1::2]]), stats


def test_leaping_matches_exact_ssa_on_two_patch_predator_prey(exact_two_patches):
    # two-sample Kolmogorov-Smirnov test (scipy.stats.ks_2samp) of each abundance at T_END,
    # leaps (the model's channels) against the in-test SSA, 2,000 replicates each: no
    # rejection at the 1 % level (4 tests)
    got, stats = _leaped_two_patches(7)
    assert stats.exact_steps == 0 and stats.leaps > 100  # leaping only, and many leaps
    # each leap carries many events: about 4,000 events per copy and time unit
    assert stats.leaps < REPS * 4_000 * T_END / 1_000
    pvalues = [st.ks_2samp(got[:, k], exact_two_patches[:, k]).pvalue for k in range(4)]
    assert min(pvalues) > 0.01, pvalues


def test_loose_leaps_fail_the_same_comparison(exact_two_patches):
    # the same comparison with the relaxation bound off and a leap condition 17 times
    # looser (ε = 0.5): a handful of leaps over the run, and KS rejects. (With the bound off
    # at the default ε, 86 leaps, KS at 2,000 replicates does not reject: it cannot see a
    # variance a few % off; the closed-form variance checks above are the sharp ones.)
    got, stats = _leaped_two_patches(7, relaxation=None, epsilon=0.5)
    assert stats.leaps < 10
    pvalues = [st.ks_2samp(got[:, k], exact_two_patches[:, k]).pvalue for k in range(4)]
    assert min(pvalues) < 1e-4, pvalues


# ------------------------------------------------------------ leap rule and bookkeeping
def test_order_rule_for_each_response_and_growth_form():
    # g_i of Cao, Gillespie & Petzold (2006, J. Chem. Phys. 124:044109; from memory): for
    # the highest-order channel reading species i, its order k when it needs one
    # individual of i; 2 + 1/(x-1) for second order with two; (3/2)(2 + 1/(x-1)) for third
    # order with two; 3 + 1/(x-1) + 2/(x-2) for third order with three
    x = np.array([50, 7, 20, 5])  # two patches: prey, then predators
    xp = x[:2].astype(float)
    two = 2.0 + 1.0 / (xp - 1.0)
    three = 3.0 + 1.0 / (xp - 1.0) + 2.0 / (xp - 2.0)
    cases = {
        ("logistic", "holling2"): (two, 2.0),          # deaths r N²/K
        ("exponential", "holling2"): (np.full(2, 2.0), 2.0),  # predation N P
        ("allee", "holling2"): (three, 2.0),            # deaths ∝ N³
        ("logistic", "holling3"): (1.5 * two, 3.0),    # predation ∝ N² P
        ("exponential", "holling3"): (1.5 * two, 3.0),
        ("allee", "holling3"): (np.maximum(three, 1.5 * two), 3.0),
        ("logistic", "beddington_deangelis"): (two, 2.0),
    }
    for (growth, response), (prey, pred) in cases.items():
        model = make_model(2, growth=growth, response=response)
        g = events._species_order(model, 2)(x)
        assert np.allclose(g, np.r_[prey, np.full(2, pred)]), (growth, response)
    # and the model's channels use the rule of their own response
    system = make_system(make_model(2, response="holling3"))
    assert np.allclose(event_channels(system).order(x)[2:], 3.0)


def test_leap_size_is_the_documented_minimum():
    # consistency test: leap_size against the formula of the module notes, term by term
    chans = _immigration_death(300.0, 0.5, reps=3)
    x = np.array([600, 2_000, 40])
    a = chans.rates(x)
    mu = 300.0 - 0.5 * x
    var = 300.0 + 0.5 * x
    c = np.maximum(0.03 * x, 1.0)
    with np.errstate(divide="ignore"):  # mu = 0 at x = 600: no bound from the mean
        cgp = np.minimum(c / np.abs(mu), c * c / var)
    relax = np.maximum(0.02 * x, 1.0) / var
    assert np.isclose(events.leap_size(x, a, chans, epsilon=0.03, relaxation=None),
                      cgp.min())
    assert np.isclose(events.leap_size(x, a, chans, epsilon=0.03, relaxation=0.02),
                      np.minimum(cgp, relax).min())
    # near equilibrium (x = nu/mu = 600) the relaxation term is the one that binds
    assert relax[0] < cgp[0]


def _network(n, growth, response, rng):
    params = make_model(n, growth=growth, response=response, capacity=300.0,
                        interference=0.3, attack_rate=0.05).params
    params = {**params, "prey_harvest": np.linspace(-0.1, 0.3, n)}  # one negative: a birth
    model = LocalModel(growth=growth, response=response, params=params)
    m = sp.random_array((n, n), density=0.4, rng=rng) * 0.1
    m.setdiag(0.0)
    m = sp.csr_array(m - sp.diags_array(1.2 * np.asarray(m.sum(axis=0)).ravel() + 0.01))
    return make_system(model, area=rng.uniform(0.5, 2.0, n), prey_movement=m,
                       predator_movement=m)


@pytest.mark.parametrize("growth,response", [("logistic", "holling2"), ("allee", "holling3"),
                                             ("exponential", "beddington_deangelis")])
def test_subset_propensities_and_dependency_lists(growth, response):
    # consistency test: rates(x, which) is rates(x)[which], and after any channel fires,
    # every propensity that changes is on that channel's list of channels to update
    rng = np.random.default_rng(3)
    chans = event_channels(_network(6, growth, response, rng))
    x = rng.integers(0, 200, 12)
    a = chans.rates(x)
    which = np.sort(rng.permutation(a.size)[: a.size // 2])
    assert np.array_equal(chans.rates(x, which), a[which])
    ptr, idx = chans.affected
    cols = chans.columns
    for j in range(a.size):
        y = x.copy()
        y[cols.indices[cols.indptr[j]:cols.indptr[j + 1]]] += cols.data[
            cols.indptr[j]:cols.indptr[j + 1]]
        changed = np.flatnonzero(chans.rates(y) != a)
        assert np.isin(changed, idx[ptr[j]:ptr[j + 1]]).all(), j


def test_exact_steps_with_dependency_updates_equal_full_recomputation(monkeypatch):
    # consistency test: the same exact-step run (exact steps only) with propensities
    # updated from the dependency lists and recomputed in full after every event gives the
    # same counts, event for event (same random numbers, same choices)
    monkeypatch.setattr(events, "PARTIAL_MIN_CHANNELS", 0)  # dependency updates at any size
    rng = np.random.default_rng(4)
    chans = event_channels(_network(8, "logistic", "holling2", rng))
    full = Channels(rates=chans.rates, change=chans.change, consumer=chans.consumer,
                    order=chans.order)  # no dependency lists: full recomputation
    x0 = rng.integers(20, 120, 16)
    s1, s2 = EventStats(), EventStats()
    a = advance_events(x0, 0.0, 2.0, chans, np.random.default_rng(9), stats=s1,
                       exact_factor=np.inf)
    b = advance_events(x0, 0.0, 2.0, full, np.random.default_rng(9), stats=s2,
                       exact_factor=np.inf)
    assert s1.exact_steps == s2.exact_steps > 1_000 and s1.leaps == 0
    assert np.array_equal(a, b)
    assert s1.updates == s1.exact_steps and s2.updates == 0  # one partial update per event


def test_poisson_draws_split_by_size_keep_their_law():
    # the counts of a leap: small means drawn by splitting one Poisson total (Kingman 1993,
    # Poisson Processes, from memory: the split counts are independent Poisson variables)
    rng = np.random.default_rng(6)
    mean = np.r_[0.0, np.linspace(0.002, 0.2, 30), 0.0, 0.3, 3.0, 40.0]
    reps = 20_000
    draws = np.array([events._poisson(rng, mean) for _ in range(reps)])
    assert np.all(draws[:, mean == 0] == 0)
    pos = mean > 0
    z = (draws[:, pos].mean(axis=0) - mean[pos]) / np.sqrt(mean[pos] / reps)
    assert np.all(np.abs(z) < 4.0)  # 34 channels: 4 standard errors each
    # Poisson's P(0) = e^{-mean} on the pooled small channels, and no correlation between
    # two of them (a shared total would correlate them if the split were not Poisson)
    small = (mean > 0) & (mean < events.SPLIT_MEAN)
    p0 = (draws[:, small] == 0).mean(axis=0)
    assert np.all(np.abs(p0 - np.exp(-mean[small]))
                  < 4.0 * np.sqrt(np.exp(-mean[small]) * (1 - np.exp(-mean[small])) / reps))
    i, j = np.flatnonzero(small)[[-1, -2]]
    assert abs(np.corrcoef(draws[:, i], draws[:, j])[0, 1]) < 4.0 / np.sqrt(reps)


# ------------------------------------------------------------------ whole-model runs
def test_demographic_noise_moves_individuals_along_links():
    # two patches, prey only, no growth: dispersal alone. The total is conserved exactly
    # (survival 1), each move is a random event, and the mean follows expm(M t) (scipy).
    from scipy.linalg import expm

    eps = 0.4
    m = sp.csr_array(np.array([[-eps, eps], [eps, -eps]]))
    params = make_model(2, growth="exponential", growth_rate=0.0, attack_rate=0.0).params
    system = make_system(LocalModel(growth="exponential", response="holling2", params=params),
                         prey_movement=m)
    reps = 400
    model = NoiseModel(centroids_km=[[0.0, 0.0], [1.0, 0.0]], seeds=range(reps),
                       demographic=True)
    y0 = np.array([50.0, 30.0, 0.0, 0.0])  # away from zero, where clipping would add mass
    traj = simulate(stack_system(system, reps), stack_state(y0, reps), duration=1.0,
                    census_interval=0.1, extinction_abundance=0.0, noise=model)
    x = traj.data["prey"].values[-1].reshape(reps, 2)
    assert np.allclose(x.sum(axis=1), 80.0)
    expected = expm(m.toarray() * 1.0) @ y0[:2]
    # each individual switches patch an even number of times or not: it ends in the other
    # patch with p = (1 - e^{-2 eps t})/2, so patch 1 holds Bin(50, p) + Bin(30, 1 - p),
    # variance 80 p (1 - p) (two-state Markov chain; common practice)
    p = (1 - np.exp(-2 * eps * 1.0)) / 2
    assert abs(x[:, 1].mean() - expected[1]) < 4 * np.sqrt(80 * p * (1 - p) / reps)
    assert x[:, 1].std() > 0.5 * np.sqrt(80 * p * (1 - p))


def _predator_prey_patches(n, area=1.0):
    """A ring of n patches with logistic prey, Holling II predators and dispersal."""
    model = make_model(n, capacity=400.0, attack_rate=0.02, handling_time=0.1,
                       conversion=0.5, mortality=0.3)
    i = np.arange(n)
    eps = 0.1
    ring = sp.csr_array((np.full(2 * n, eps / 2 * 0.9), (np.r_[(i + 1) % n, (i - 1) % n],
                                                         np.r_[i, i])), shape=(n, n))
    m = sp.csr_array(ring - sp.diags_array(np.full(n, eps)))  # 10% die in transit
    return make_system(LocalModel(growth=model.growth, response=model.response,
                                  params=model.params), area=np.full(n, area),
                       prey_movement=m, predator_movement=m)


def test_event_run_is_reproducible_and_integer():
    system = _predator_prey_patches(5)
    y0 = np.r_[np.full(5, 200.4), np.full(5, 20.0)]
    model = NoiseModel(centroids_km=np.c_[np.arange(5.0), np.zeros(5)], seeds=[11],
                       demographic=True, environmental_sd=0.3, correlation_km=2.0)
    a = simulate(system, y0, duration=5.0, census_interval=0.5, noise=model)
    b = simulate(system, y0, duration=5.0, census_interval=0.5, noise=model)
    other = simulate(system, y0, duration=5.0, census_interval=0.5,
                     noise=dataclasses_replace(model, seeds=(12,)))
    for s in ("prey", "predator"):  # same seed, same numbers bit for bit (common practice)
        assert np.array_equal(a.data[s].values, b.data[s].values)
        v = a.data[s].values
        assert np.all(v == np.round(v)) and np.all(v >= 0)
    assert not np.array_equal(a.data["prey"].values, other.data["prey"].values)


def dataclasses_replace(obj, **kw):
    import dataclasses

    return dataclasses.replace(obj, **kw)


def test_dispersal_only_conserves_the_total_exactly():
    # two patches, dispersal alone with survival 1: every event moves one individual, so
    # the total is an invariant at every census (integers, exactly; common practice), and
    # the mean of patch 1 follows the two-state Markov chain as in the test above
    eps = 0.4
    m = sp.csr_array(np.array([[-eps, eps], [eps, -eps]]))
    params = make_model(2, growth="exponential", growth_rate=0.0, attack_rate=0.0,
                        mortality=0.0).params
    system = make_system(LocalModel(growth="exponential", response="holling2", params=params),
                         prey_movement=m, predator_movement=m)
    reps = 100
    model = NoiseModel(centroids_km=[[0.0, 0.0], [1.0, 0.0]], seeds=range(reps),
                       demographic=True)
    y0 = np.array([500.0, 3.0, 7.0, 0.0])
    traj = simulate(stack_system(system, reps), stack_state(y0, reps), duration=3.0,
                    census_interval=0.5, noise=model)
    prey = traj.data["prey"].values.reshape(-1, reps, 2)
    pred = traj.data["predator"].values.reshape(-1, reps, 2)
    assert np.all(prey.sum(axis=2) == 503) and np.all(pred.sum(axis=2) == 7)
    p = (1 - np.exp(-2 * eps * 3.0)) / 2
    mean1 = 500 * p + 3 * (1 - p)
    assert abs(prey[-1, :, 1].mean() - mean1) < 4 * np.sqrt(503 * p * (1 - p) / reps)


def _ssa_absorbed_below(x0, b, d, level, t_end, reps, rng):
    """Exact SSA (Gillespie 1977, direct method) of a linear birth-death process, vectorised
    over replicates: True where the count fell below ``level`` by ``t_end``."""
    x = np.full(reps, x0)
    t = np.zeros(reps)
    gone = np.zeros(reps, dtype=bool)
    live = np.ones(reps, dtype=bool)
    while live.any():
        total = (b + d) * x[live]
        t[live] += rng.exponential(1.0 / total)
        over = t[live] > t_end
        step = np.where(rng.random(total.size) < b / (b + d), 1, -1)
        idx = np.flatnonzero(live)
        x[idx[~over]] += step[~over]
        fell = idx[~over][x[idx[~over]] < level]
        gone[fell] = True
        live[idx[over]] = False
        live[fell] = False
    return gone


@pytest.mark.parametrize("census", [0.05, 2.0])
def test_event_runs_remove_populations_where_they_fall_not_at_census(census):
    # quasi-extinction in whole individuals: a population falling from 5 to 4 is removed at
    # that moment, so the share removed by t = 2 is the first-passage probability of the
    # birth-death process below 5, whatever the census interval; the reference is an exact
    # SSA written here (Gillespie 1977). A census-time rule would miss the populations that
    # dip below 5 and recover between two censuses (at census 2: about half of them).
    b = d = 1.0
    x0, level, t_end, patches = 8, 5.0, 2.0, 2_000
    traj = _birth_death(b, d, x0, t_end, patches, 21, census, extinction_abundance=level)
    share = float(np.mean(traj.data["prey"].values[-1] == 0))
    exact = float(np.mean(_ssa_absorbed_below(x0, b, d, level, t_end, 20_000,
                                              np.random.default_rng(4))))
    se = np.sqrt(exact * (1 - exact) / patches + exact * (1 - exact) / 20_000)
    assert abs(share - exact) < 4 * se, (share, exact, se)
    # every removal took exactly 4 individuals (the count just below the threshold)
    removals, held = traj.stats.removals[0], traj.stats.removed_individuals[0]
    assert removals == int(round(share * patches)) and held == 4.0 * removals


@pytest.mark.parametrize("factor, removed", [(0.0, 0), (0.1, 1)])
def test_both_engines_count_a_shock_through_the_threshold_alike(factor, removed):
    # consistency test of the two engines' quasi-extinction rule: a shock that leaves 1 of 10
    # predators (threshold 2) removes that population by the rule; one that empties the patch
    # outright removed it itself, so the rule removes nothing (counts per species)
    from trophoscape.model.shocks import StateScale

    system = make_system(make_model(1, growth="logistic", capacity=50.0))
    shock = StateScale(time=0.5, species="predator", index=np.array([0]), factor=factor)
    y0 = np.array([40.0, 10.0])
    ode = simulate(system, y0, duration=1.0, census_interval=0.5, extinction_abundance=2.0,
                   events=[shock])
    noise = NoiseModel(centroids_km=[[0.0, 0.0]], seeds=[1], demographic=True)
    whole = simulate(system, y0, duration=1.0, census_interval=0.5, extinction_abundance=2.0,
                     events=[shock], noise=noise)
    for run in (ode, whole):
        assert run.stats.removals[1] >= removed
        assert run.data["predator"].values[-1, 0] == 0.0
    assert ode.stats.removals[1] == removed  # deterministic: nothing else falls through
    # the event run may also lose the last predators by chance before the shock; after it,
    # both engines agree that an emptied patch is not a removal by the rule
    if factor == 0.0:
        assert whole.stats.removed_individuals[1] == ode.stats.removed_individuals[1] == 0.0
