"""A solver step in which populations fall through the extinction threshold, taken again
over the part of the network that the removals change.

The rule of :mod:`trophoscape.integrate.ode` removes a population the moment it falls through
the threshold. Restarting the whole network's solver at every such moment makes a run in
which thousands of populations dwindle cost a whole-network step per removal. Instead, when
an accepted Runge–Kutta step of the whole network holds removals, that step is taken again
over a *region*: the patches with a removal and the patches around them, started from the
state at the step's start, with

* the region's own equations (local terms and the links within it) integrated by the
  Dormand–Prince 5(4) pair (the tableau of :class:`scipy.integrate.RK45`), its error
  controlled per component at the run's tolerances, in separate *groups* (the region's
  connected parts), each with its own clock and step size;
* the immigrants from outside the region read from the whole step's interpolant, at each
  group's own times;
* every removal taken where it happens, on the group's interpolant (dips between step ends
  included), after which that group goes on from the state with the population removed:
  one group's removals never cut another group's steps.

What the region sends out differs from the whole step's interpolant only by what the
removals changed; the integral of that difference is carried as an extra quadrature of the
same stages, and the patches just outside receive it as a correction at the step's end.
A patch outside whose correction exceeds the tolerance (or that the correction would take
through the threshold) joins the region, and the groups it joins are integrated again (the
others keep their result), until every correction left outside is within the tolerance; a
region of more than half of the network becomes the whole network, whose integration has no
outside at all (or, on large networks, the step is refused and tried again shorter: see
``refuse`` in :meth:`StepRetaker.retake`).

The same serves the few patches that a whole-network step leaves over the tolerance
(:data:`trophoscape.integrate.ode.SPARE_SHARE`): they form the region, with or without
removals, and are integrated at their own step sizes.

The groups are integrated by numpy (the reference), or group by group by the compiled code
of :mod:`trophoscape.integrate.compiled` when the system evaluates its local terms by
compiled code (numba installed, 10,000 patches and more by default).

The outside reference for all of this is scipy's event location restarted at every
crossing (``tests/test_removals.py``), and scipy's ``solve_ivp`` without removals.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.integrate as si
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components

from ..errors import RunError
from .crossings import (LOOKS, NEAR, REFINE, ROUNDS as REFINE_ROUNDS, Rows,
                        crossing_positions, falls_through_within, horner,
                        interpolant_arrays)

__all__ = ["StepRetaker"]

_RK = si.RK45
_A = np.asarray(_RK.A)
_B = np.asarray(_RK.B)
_C = np.asarray(_RK.C)
_E = np.asarray(_RK.E)
_P = np.asarray(_RK.P)
_STAGES = _RK.n_stages
_EXPONENT = -1.0 / (_RK.error_estimator_order + 1)
# scipy's step-size controller (scipy.integrate._ivp.rk)
_SAFETY, _MIN_FACTOR, _MAX_FACTOR = 0.9, 0.2, 10.0

#: An outside population whose first-order correction exceeds this many tolerance units
#: (``atol + rtol |y|``) joins the region.
GROW = 1.0
#: A region of more than this share of the patches is taken as the whole network.
WHOLE = 0.5
#: Rounds of growing the region before it is taken as the whole network.
ROUNDS = 12


@dataclass
class Retaken:
    """A step taken again over a region.

    Attributes
    ----------
    y : ndarray, shape (2 n,)
        The state at the step's end: the region's integrated again, the patches just
        outside corrected, the rest the whole step's.
    components : ndarray of int
        The state components of the region.
    census : ndarray, shape (len(census_times), len(components))
        The region's values at the census times inside the step.
    removals : ndarray of int, shape (2,)
        Populations removed in the step, per species.
    removed : ndarray, shape (2,)
        Individuals they held.
    evaluations : float
        Right-hand-side evaluations, in whole-network evaluations (the components evaluated
        over the network's, summed over every evaluation).
    """

    y: np.ndarray
    components: np.ndarray
    census: np.ndarray
    removals: np.ndarray
    removed: np.ndarray
    evaluations: float


class StepRetaker:
    """Takes steps with removals again over regions of one network.

    Parameters
    ----------
    area, model, movement
        The network in the solver's order (:meth:`trophoscape.model.system.CoupledSystem.parts`):
        the right-hand side is the local terms of ``model`` on ``max(y, 0)`` plus
        ``movement @ max(y, 0)``.
    share : StepRetaker, optional
        A retaker of another system; what depends only on the movement operator (the
        patches' links) is taken from it when the operator is the same object.
    compiled : bool
        Integrate the regions' groups with the compiled code of
        :mod:`trophoscape.integrate.compiled` (numba; the model's growth form and response
        must be known to it), else with numpy.
    """

    def __init__(self, area, model, movement, share=None, compiled=False):
        self.area = np.asarray(area, dtype=float)
        self.model = model
        self.compiled = None
        if compiled:
            from . import compiled as module
            from ..model import compiled as local

            if local.supports(model):
                self.compiled = module
                self._block = local.parameter_block(model, self.area.size)
                self._codes = local.codes(model)
        self.n = n = self.area.size
        self._operator = movement
        # work arrays of the network's size, allocated once: all False / -1 between uses
        self._mark = np.zeros(2 * n, dtype=bool)
        self._position = np.full(2 * n, -1, dtype=np.int64)
        if share is not None and share._operator is movement:
            self.movement, self.links = share.movement, share.links
            self._transposed, self._apart = share._transposed, share._apart
            return
        self.movement = sp.csr_array(movement)
        # by rows of the transpose: where each component sends
        self._transposed = sp.csr_array(self.movement.T)
        block = abs(self.movement[:n, :n]) + abs(self.movement[n:, n:])
        self.links = sp.csr_array(block + block.T)
        # each species' components send only to their own species' (stored entries)
        t = self._transposed
        self._apart = bool(np.array_equal(
            t.indices >= n, np.repeat(np.arange(2 * n) >= n, np.diff(t.indptr))))

    # ------------------------------------------------------------------------------------
    def _distinct(self, index):
        """The distinct values of ``index`` (components, or patches), in increasing order."""
        mark = self._mark
        mark[index] = True
        out = np.flatnonzero(mark)
        mark[out] = False
        return out

    def _positions(self, distinct, index):
        """Where each of ``index`` is in ``distinct`` (which holds them all)."""
        position = self._position
        position[distinct] = np.arange(distinct.size)
        out = position[index]
        position[distinct] = -1
        return out

    def _within(self, patches):
        """The links among ``patches``, numbered as they come in ``patches``."""
        position = self._position
        position[patches] = np.arange(patches.size)
        row, col, weight = _gather(self.links, patches)
        local = position[col]
        position[patches] = -1
        inside = local >= 0
        indptr = np.r_[0, np.cumsum(np.bincount(row[inside], minlength=patches.size))]
        return sp.csr_array((weight[inside], local[inside], indptr),
                            shape=(patches.size, patches.size))

    def _corrections(self, members, sent):
        """What the components of the region's ``members`` sent out (``sent``, minus the
        step's course) along their links to components outside: the components reached
        (increasing) and the first-order change of each."""
        n = self.n
        matrix = self._transposed
        if self.compiled is not None:
            from ..model.compiled import on_threads

            return on_threads(self.compiled.corrections, members, n, matrix.indptr,
                              matrix.indices, matrix.data, sent, self._mark, self._position,
                              self._apart)
        inside = np.concatenate([members, members + n])
        row, col, rate = _gather(matrix, inside)  # row: a component of the region
        self._mark[inside] = True
        away = ~self._mark[col]
        self._mark[inside] = False
        col = col[away]
        targets = self._distinct(col)
        which = self._positions(targets, col)
        return targets, np.bincount(which, weights=rate[away] * sent[inside[row[away]]],
                                    minlength=targets.size)

    def _joined(self, members, new):
        """The ``members`` in the connected groups that hold any of ``new``."""
        if self.compiled is not None:
            links = self.links
            return self.compiled.joined(members, new, links.indptr, links.indices,
                                        self._position, self._mark)
        _, label = connected_components(self._within(members), directed=False)
        return members[np.isin(label, label[np.isin(members, new)])]

    def retake(self, t0, y0, t1, y1, dense, patches, level, armed, rtol, atol,
               census=(), refuse=False) -> Retaken | None:
        """Take the step ``t0 -> t1`` again over the patches with removals and around them.

        Parameters
        ----------
        t0, y0, t1, y1 : float, ndarray
            The whole step's start and end (``y1`` as the whole network's solver found it,
            removals not taken).
        dense : scipy dense output
            The whole step's interpolant (a Runge–Kutta one, per component).
        patches : ndarray of int
            Patches with a population falling through ``level`` in the step.
        level : float
            The extinction threshold.
        armed : ndarray of bool, shape (2 n,)
            Populations at or above ``level`` at ``t0`` (those can fall through it).
        rtol, atol : float
            Tolerances, per component.
        census : sequence of float
            Census times inside ``(t0, t1]``.
        refuse : bool
            Return None, instead of taking the step again over the whole network, when the
            region grows to it (:data:`WHOLE`, :data:`ROUNDS`) from more than one patch: the
            network is then mostly one group, whose every removal cuts its steps, so such a
            step costs about its removals times the network's size; the caller takes a
            shorter step instead.
        """
        n = self.n
        patches = self._distinct(np.asarray(patches, dtype=np.int64))
        # the region's patches: those and their neighbours
        members = self._distinct(np.concatenate([patches, _gather(self.links, patches)[1]]))
        todo = members  # the patches to integrate in this round
        census = np.asarray(census, dtype=float)
        y = np.asarray(y1, dtype=float).copy()
        # per component of the region (written for every component integrated, read only
        # for those: np.empty leaves the pages of the others untouched)
        sent = np.empty(2 * n)  # what each component sent, minus the step's course
        counts = np.empty(2 * n, dtype=np.int64)
        held = np.empty(2 * n)
        rounds_census = []  # (components, their census values) of each round
        evaluations = 0.0
        # the compiled regions read the whole step's interpolant over the network
        interpolant = None if self.compiled is None else interpolant_arrays(dense)
        for rounds in range(1, ROUNDS + 2):
            if rounds > ROUNDS or members.size > WHOLE * n:
                if refuse and patches.size > 1:
                    return None
                members = todo = np.arange(n)
            whole = members.size == n
            out = _Region(self, todo, t0, y0, t1, dense, level, armed, rtol, atol, census,
                          sends=not whole, interpolant=interpolant)
            comps = out.components
            y[comps], sent[comps], counts[comps], held[comps] = out.x, out.q, out.counts, out.held
            if census.size:
                rounds_census.append((comps, out.census))
            evaluations += out.evaluations
            if whole:
                break
            # the first-order change of the components just outside the region: what the
            # region's components sent, minus the step's course, along their links out
            targets, change = self._corrections(members, sent)
            before = y[targets]
            after = before + change
            grow = (np.abs(change) > GROW * (atol + rtol * np.abs(before))) | (
                armed[targets] & (after < level) & (before >= level))
            if not grow.any():
                y[targets] = after
                break
            # those patches join; the groups they join are integrated again, the rest kept
            joining = self._distinct(targets[grow] % n)
            self._mark[members] = True
            new = joining[~self._mark[joining]]
            self._mark[members] = False
            members = self._distinct(np.concatenate([members, new]))
            todo = self._joined(members, new)
        components = np.concatenate([members, members + n])
        species = (components >= n).astype(np.int64)
        # the census values of the region, the last round's where a group was taken again
        record = np.empty((census.size, components.size))
        if census.size:
            position = self._position
            position[components] = np.arange(components.size)
            for comps, values in rounds_census:
                record[:, position[comps]] = values
            position[components] = -1
        return Retaken(y=y, components=components, census=record,
                       removals=np.bincount(species, weights=counts[components],
                                            minlength=2).astype(np.int64),
                       removed=np.bincount(species, weights=held[components], minlength=2),
                       evaluations=evaluations)


class _Region:
    """One integration of a region over a step (see the module's description).

    The groups still integrating are *active*; when they hold less than half of the active
    components, the finished groups' values are written out and the arrays narrowed to the
    others, so a group that needs many steps does not carry the finished ones along.
    """

    #: Narrow the active arrays when the live groups hold less than this share of them.
    NARROW = 0.5

    def __init__(self, retaker: StepRetaker, patches, t0, y0, t1, dense, level, armed,
                 rtol, atol, census, sends=True, interpolant=None):
        n = retaker.n
        self.t0, self.span = float(t0), float(t1) - float(t0)
        self.sends = sends  # what it sends out is compared with the step's own course
        self.evaluations = 0.0
        self._unit = 1.0 / (2 * n)
        if retaker.compiled is not None:
            self._run_compiled(retaker, patches, y0, interpolant, armed, float(level),
                               float(rtol), float(atol), census)
            return
        # patches in the order of their groups, so each group's components are contiguous
        _, label = connected_components(retaker._within(patches), directed=False)
        order = np.argsort(label, kind="stable")
        patches, label = patches[order], label[order]
        m = patches.size
        comps = np.concatenate([patches, patches + n])
        self.components = comps
        position = retaker._position  # -1 but for the region's components, for now
        position[comps] = np.arange(2 * m)
        # the region's rows of the movement operator: links within it, and in from outside
        row, col, rate = _gather(retaker.movement, comps)  # in the order of the rows
        # entries stored with a zero rate are no links (the groups, from self.links, know
        # none of them; movement_operator stores zeros where no individual arrives alive)
        nonzero = rate != 0
        row, col, rate = row[nonzero], col[nonzero], rate[nonzero]
        local = position[col]
        inside = local >= 0
        indptr = np.r_[0, np.cumsum(np.bincount(row[inside], minlength=2 * m))]
        self._within = sp.csr_array((rate[inside], local[inside], indptr),
                                    shape=(2 * m, 2 * m))
        position[comps] = -1
        self._in = row[~inside], col[~inside], rate[~inside]
        self._patches, self._retaker, self._dense = patches, retaker, dense
        self._start(y0, m, census)
        self._run(label, np.asarray(armed)[comps].copy(), float(level), float(rtol),
                  float(atol), census)

    def _start(self, y0, m, census):
        """The region's state at the step's start, and its outputs, empty."""
        self.counts = np.zeros(2 * m, dtype=np.int64)  # removals per component
        self.held = np.zeros(2 * m)  # individuals they held
        self.x = np.asarray(y0, dtype=float)[self.components]
        self.q = np.zeros(2 * m)
        self.census = np.full((np.size(census), 2 * m), np.nan)

    def _run_compiled(self, retaker, patches, y0, interpolant, armed, level, rtol, atol,
                      census):
        """The region set up (:func:`trophoscape.integrate.compiled.region_setup`: its
        groups, the links within it and in from outside, the immigrants from sources that
        stay positive over the whole step summed into one polynomial per component) and
        integrated group by group (:func:`~trophoscape.integrate.compiled.run_groups`), as
        the numpy setup and :meth:`_run` do."""
        import numba

        from ..model.compiled import on_threads  # numba's threads

        module = retaker.compiled
        kind, y_old, coef, h = interpolant
        links, movement = retaker.links, retaker.movement
        # the rows in as many runs as numba has threads (the same result for any number)
        (order, starts, comps, w_ptr, w_idx, w_val, p_old, p_coef, i_ptr, i_src,
         i_rate) = on_threads(
            module.region_setup, np.asarray(patches, dtype=np.int64), retaker.n, links.indptr,
            links.indices, movement.indptr, movement.indices, movement.data, retaker._position,
            kind, y_old, coef, h, numba.config.NUMBA_NUM_THREADS)
        self.components = comps
        m = order.size
        self._start(y0, m, census)
        growth, response, harvest = retaker._codes
        groups = starts.size - 1
        status = np.zeros(groups, dtype=np.int64)
        evaluations = np.zeros(groups)
        census = np.ascontiguousarray(census, dtype=float)
        on_threads(
            module.run_groups, starts, m, self.t0, self.span, self.x, self.q,
            np.asarray(armed)[comps], level, rtol, atol, w_ptr, w_idx, w_val, p_old, p_coef,
            i_ptr, i_src, i_rate, kind, y_old, coef, h, self.sends, comps, growth, response,
            harvest, order, retaker.area, retaker._block, census, self.census, self.counts,
            self.held, _A, _B, _C, _E, _P, _SAFETY, _MIN_FACTOR, _MAX_FACTOR, _EXPONENT, NEAR,
            LOOKS, REFINE, REFINE_ROUNDS, status, evaluations)
        self.evaluations = float(evaluations.sum()) * self._unit
        if np.any(status == module.NOT_A_NUMBER):
            raise RunError(_NOT_A_NUMBER.format(time=self.t0))
        if np.any(status != module.DONE):  # pragma: no cover
            raise RunError("the integration of a step taken again over a region did not "
                           f"reach the step's end (time {self.t0 + self.span:.6g})")

    # ------------------------------------------------------------------------------------
    def _focus(self, keep):
        """Make the region's components ``keep`` (whole groups, both species) the active
        ones: their links, immigrants, interpolant rows and local parameters."""
        first = getattr(self, "index", None) is None
        self.m = half = keep.size // 2
        if first:  # every component: gathered from the whole step's interpolant
            self.within = self._within
            self.in_row, self.in_col, self.in_rate = self._in
            self.inflow = Rows(self._dense, self.in_col) if self.in_row.size else None
            self.mine = Rows(self._dense, self.components) if self.sends else None
        else:  # narrowed from the active ones (keep is a subset of self.index)
            position = np.full(self.components.size, -1, dtype=np.int64)
            position[self.index] = np.arange(self.index.size)
            sub = position[keep]
            self.within = self.within[sub][:, sub]
            inner = np.full(self.index.size, -1, dtype=np.int64)
            inner[sub] = np.arange(sub.size)
            chosen = inner[self.in_row] >= 0
            self.in_row, self.in_col = inner[self.in_row[chosen]], self.in_col[chosen]
            self.in_rate = self.in_rate[chosen]
            self.inflow = self.inflow.take(chosen) if self.in_row.size else None
            self.mine = self.mine.take(sub) if self.sends else None
        self.index = keep
        patches = self._patches[keep[:half]]
        self.area = np.concatenate([self._retaker.area[patches]] * 2)
        model = self._retaker.model
        self.model = type(model)(growth=model.growth, response=model.response,
                                 params={k: np.asarray(v)[patches] if np.ndim(v) else v
                                         for k, v in model.params.items()})

    def _f(self, t, x):
        """The active components' derivative and, where the region sends out, the
        difference of their clipped state from the whole step's; ``t`` per group."""
        m = self.m
        xc = np.maximum(x, 0.0)
        dens = xc / self.area
        dn, dp = self.model.rates(dens[:m], dens[m:])
        dy = np.concatenate([dn, dp]) * self.area
        dy += self.within @ xc
        theta = (t - self.t0) / self.span
        if self.in_row.size:
            outside = np.maximum(self.inflow(theta[self.in_group]), 0.0)
            dy += np.bincount(self.in_row, weights=self.in_rate * outside, minlength=2 * m)
        g = None
        if self.sends:
            g = xc - np.maximum(self.mine(theta[self.group]), 0.0)
        self.evaluations += x.size * self._unit
        return dy, g

    def _groups(self, label):
        """Group numbers of the active components (from 0, contiguous) and where each
        group starts in either species' half."""
        half = label[:self.m]
        starts = np.flatnonzero(np.r_[True, half[1:] != half[:-1]])
        number = np.cumsum(np.r_[0, half[1:] != half[:-1]])
        self.group = np.concatenate([number, number])
        self.in_group = self.group[self.in_row]
        return starts

    def _record(self, census, passing, next_census, passed, starts, t, hc, at):
        """The census times each ``passing`` group's accepted step passed
        (``next_census[g]`` to ``passed[g] - 1``), every component of the group at each, on
        the step's interpolant, in one array operation."""
        groups = np.flatnonzero(passing)
        times = passed[groups] - next_census[groups]  # census times per group
        size = np.diff(np.r_[starts, self.m])[groups]  # patches per group
        # one entry per (group, census time, component): both species of each patch
        per = np.repeat(2 * size, times)
        pair_group = np.repeat(groups, times)
        first = np.repeat(np.cumsum(times) - times, times)
        pair_census = next_census[pair_group] + np.arange(times.sum()) - first
        entry_group = np.repeat(pair_group, per)
        entry_census = np.repeat(pair_census, per)
        offset = np.arange(per.sum()) - np.repeat(np.cumsum(per) - per, per)
        patch = starts[entry_group] + offset % np.repeat(size[np.searchsorted(
            groups, pair_group)], per)
        rows = np.where(offset < np.repeat(size[np.searchsorted(groups, pair_group)], per),
                        patch, patch + self.m)
        pos = (census[entry_census] - t[entry_group]) / np.where(hc[rows] > 0, hc[rows], 1.0)
        self.census[entry_census, self.index[rows]] = at(rows, np.clip(pos, 0.0, 1.0))

    def _run(self, label, armed, level, rtol, atol, census):
        census = np.asarray(census, dtype=float)
        t1 = self.t0 + self.span
        tiny = 1e-12 * self.span
        self.index = None
        self._focus(np.arange(self.components.size))
        label = np.concatenate([label, label])
        starts = self._groups(label)
        k = starts.size
        x, q = self.x.copy(), self.q.copy()
        t = np.full(k, self.t0)
        h = np.full(k, self.span)
        rejected = np.zeros(k, dtype=bool)
        stale = np.ones(k, dtype=bool)  # the derivative at (t, x) is to be evaluated
        next_census = np.zeros(k, dtype=np.int64)
        K = G = None
        for _ in range(100_000):
            live = t < t1 - tiny
            if not live.any():
                break
            sizes = np.diff(np.r_[starts, self.m])  # patches per group
            if sizes[live].sum() < self.NARROW * self.m and x.size > 64 and K is not None:
                # write out the finished groups; go on with the live ones
                done = ~live[self.group]
                self.x[self.index[done]] = x[done]
                self.q[self.index[done]] = q[done]
                keep = np.flatnonzero(~done)
                self._focus(self.index[keep])
                label = label[keep]
                starts = self._groups(label)
                x, q, armed = x[keep], q[keep], armed[keep]
                K, G = K[:, keep], (None if G is None else G[:, keep])
                t, h, rejected, stale, next_census = (a[live] for a in (
                    t, h, rejected, stale, next_census))
                live = live[live]
                k = live.size
            group = self.group
            step = np.where(live, np.minimum(h, t1 - t), 0.0)
            step = np.where(live & (t1 - (t + step) <= tiny), t1 - t, step)
            hc = step[group]
            if K is None:
                K = np.empty((_STAGES + 1, x.size))
                G = np.empty((_STAGES + 1, x.size)) if self.sends else None
            if stale.any():  # else the last stage of the accepted steps (first same as last)
                K[0], g0 = self._f(t, x)
                if G is not None:
                    G[0] = g0
            for s in range(1, _STAGES):
                dy = (K[:s].T @ _A[s, :s]) * hc
                K[s], gs = self._f(t + _C[s] * step, x + dy)
                if G is not None:
                    G[s] = gs
            x_new = x + hc * (K[:_STAGES].T @ _B)
            K[-1], gl = self._f(t + step, x_new)
            if G is not None:
                G[-1] = gl
            scale = atol + rtol * np.maximum(np.abs(x), np.abs(x_new))
            with np.errstate(invalid="ignore", divide="ignore"):  # 0/0 where atol = 0
                err_c = np.abs(hc * (K.T @ _E)) / scale
            m = self.m
            err = np.maximum(np.maximum.reduceat(err_c[:m], starts),
                             np.maximum.reduceat(err_c[m:], starts))
            err = np.where(np.isnan(err), np.inf, err)
            if np.any(live & ~np.isfinite(err) & (step <= tiny)):
                raise RunError(_NOT_A_NUMBER.format(time=self.t0))
            accept = live & ((err < 1.0) | (step <= tiny))
            factor = _SAFETY * np.maximum(err, 1e-30) ** _EXPONENT
            grow = np.minimum(_MAX_FACTOR, factor)
            shrink = np.maximum(_MIN_FACTOR, np.minimum(1.0, factor))
            grow = np.where(rejected, np.minimum(1.0, grow), grow)
            h = np.where(live, np.where(accept, step * grow, step * shrink), h)
            rejected = np.where(accept, False, rejected | live)
            stale[:] = False
            if not accept.any():
                continue
            # crossings in the accepted steps, on each group's interpolant
            Q = K.T @ _P  # (components, 4)

            def at(index, pos, Q=Q, x=x, hc=hc):
                # the interpolant of scipy's RK45, x + h sum_j Q_j pos**(j + 1)
                return hc[index] * horner(Q[index], pos) + x[index]

            acc = accept[group]
            crossed = acc & armed & (x_new < level)
            near = np.flatnonzero(acc & ~crossed
                                  & (np.minimum(x, x_new) < (1.0 + NEAR) * level)
                                  & (np.maximum(x, x_new) > (1.0 - NEAR) * level))
            if near.size:
                crossed[near[falls_through_within(at, near, level, armed[near])]] = True
            cut = np.full(k, np.inf)
            index = np.flatnonzero(crossed)
            if index.size:
                where, _ = crossing_positions(at, index, level, armed[index])
                np.minimum.at(cut, group[index], where)
            cut_groups = np.isfinite(cut)
            end = t + np.where(cut_groups, cut, 1.0) * step
            # census times the accepted steps pass (one at a crossing: after the removal)
            if census.size:
                passed = np.where(cut_groups, np.searchsorted(census, end, side="left"),
                                  np.searchsorted(census, end, side="right"))
                passing = accept & (passed > next_census)
                if passing.any():
                    self._record(census, passing, next_census, passed, starts, t, hc, at)
                    next_census = np.where(passing, passed, next_census)
            whole = acc & ~cut_groups[group]
            x = np.where(whole, x_new, x)
            if G is not None:
                q = np.where(whole, q + hc * (G[:_STAGES].T @ _B), q)
            # the next step starts where this one ended: its first stage is this one's last
            K[0] = np.where(whole, K[-1], K[0])
            if G is not None:
                G[0] = np.where(whole, G[-1], G[0])
            if cut_groups.any():
                rows = np.flatnonzero(cut_groups[group])
                pos = cut[group[rows]]
                y_cut = at(rows, pos)
                falling = armed[rows] & (y_cut < level)
                falling |= crossed[rows] & (_spread(index, crossed.size, where)[rows] == pos)
                if G is not None:  # the quadrature on its own interpolant
                    q[rows] = at(rows, pos, Q=G.T @ _P, x=q)
                gone = rows[falling]
                self.counts[self.index[gone]] += 1
                self.held[self.index[gone]] += y_cut[falling]
                y_cut[falling] = 0.0
                x[rows] = y_cut
                stale |= cut_groups
            armed = np.where(acc, x >= level, armed)
            t = np.where(accept, end, t)
        else:  # pragma: no cover
            raise RunError("the integration of a step taken again over a region did not "
                           f"reach the step's end (time {t1:.6g})")
        self.x[self.index] = x
        self.q[self.index] = q


_NOT_A_NUMBER = ("the error estimate is not a number near time {time:.6g} (a step taken "
                 "again over a region, for removals or patches over the tolerance): "
                 "abundances became non-finite, or a population at zero has no error scale "
                 "(atol = 0); use atol > 0 and check for explosive growth")


def _gather(matrix, rows):
    """The entries of the CSR ``matrix`` in ``rows``, row by row in that order, each row's
    in its stored order: ``(position of the row in rows, column, value)``."""
    begin = matrix.indptr[rows]
    count = matrix.indptr[rows + 1] - begin
    total = int(count.sum())
    first = np.cumsum(count) - count  # where each row's entries start in the result
    at = np.arange(total) + np.repeat(begin - first, count)
    return np.repeat(np.arange(rows.size), count), matrix.indices[at], matrix.data[at]


def _spread(index, size, where):
    """``where`` (values for ``index``) spread over ``size`` components (``inf`` elsewhere)."""
    out = np.full(size, np.inf)
    out[index] = where
    return out
