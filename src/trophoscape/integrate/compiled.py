"""Optional compiled code for steps taken again over a region (numba).

:class:`trophoscape.integrate.retake._Region` integrates a region's connected groups, each
with its own clock and step size, in numpy: every array operation goes over all the groups
still integrating. This module does the same group by group in one compiled loop, each group
with its own stages, so a group's step costs what its own components cost, and the groups
are shared out over the cores (they are independent: each reads the whole step's
interpolant and writes only its own components).

The method is the numpy one, operation for operation: the Dormand–Prince 5(4) tableau of
``scipy.integrate.RK45`` and scipy's step-size controller, the error per component, the
crossings looked for on ``crossings.LOOKS + 1`` points of each accepted step's interpolant
and narrowed by ``crossings.REFINE`` points per round, every removal at its own moment, the
census values on the group's interpolant. Sums are taken in another order than numpy's, so
the two paths agree to rounding, not bit for bit; both are checked against scipy's event
location in ``tests/test_removals.py``.

The region is set up here too, in one pass each, on numba's threads where the work
splits without two threads writing one place (:func:`region_setup`: its groups by
union-find, the links within it and in from outside; :func:`corrections`: what it sends to
the components just outside; :func:`joined`: the groups that patches joining it fall into),
where the numpy path builds the same arrays by index arithmetic and scipy.

Indices read from arrays (CSR rows and columns, sources) are taken as unsigned (``np.uintp``)
where they index: with signed ones numba checks every index for a negative (wrap-around)
value, which made such loops about twice as slow (benchmarks/README.md, "Both cores for the whole
network's steps").

Used only with the compiled local terms (``CoupledSystem.local_terms_used == "compiled"``,
numba installed); the numpy path is the reference and the fallback. This module imports
numba at import time: :mod:`trophoscape.integrate.retake` imports it only when a retaker
takes the compiled path.
"""

from __future__ import annotations

import numba
import numpy as np

from ..model.compiled import clipped, jit, local_one

#: Status codes returned by :func:`run_groups`.
DONE, NOT_A_NUMBER, TOO_MANY_STEPS = 0, 1, 2
#: Steps per group before the integration is given up (as the numpy path).
MAX_STEPS = 100_000


@jit(inline=True)
def _horner(coef, row, theta):  # pragma: no cover - compiled
    """``sum_j coef[row, j] theta**(j + 1)`` by Horner's rule (``crossings.horner``)."""
    row = np.uintp(row)
    terms = coef.shape[1]
    acc = coef[row, terms - 1] * theta
    for j in range(terms - 2, -1, -1):
        acc += coef[row, j]
        acc *= theta
    return acc


@jit(inline=True)
def _interpolant(kind, old, coef, h, row, theta):  # pragma: no cover - compiled
    """Row ``row`` of the whole step's interpolant at ``theta`` (0 at the step's start):
    scipy's Runge–Kutta form (kind 0: ``old + h sum_j coef_j theta**(j + 1)``) or its DOP853
    form (kind 1: factors alternately times ``theta`` and ``1 - theta``)."""
    row = np.uintp(row)
    if kind == 0:
        return h * _horner(coef, row, theta) + old[row]
    y = 0.0
    for i in range(coef.shape[1]):
        y += coef[row, i]
        if i % 2 == 0:
            y *= theta
        else:
            y *= 1.0 - theta
    return y + old[row]


@jit(inline=True)
def _own(Q, x, hc, j, pos):  # pragma: no cover - compiled
    """The group's own interpolant (scipy's RK45 form) of local component ``j`` at ``pos``."""
    return hc * _horner(Q, j, pos) + x[j]


@jit
def _first_fall(Q, x, hc, j, level, armed, looks):  # pragma: no cover - compiled
    """The first of ``looks + 1`` even points of the step below ``level`` after one at or
    above it (or ``armed`` at the start); -1 when there is none."""
    seen = armed or _own(Q, x, hc, j, 0.0) >= level
    for k in range(1, looks + 1):
        v = _own(Q, x, hc, j, k / looks)
        if v < level and seen:
            return k
        if v >= level:
            seen = True
    return -1


@jit
def _crossing(Q, x, hc, j, level, first, looks, refine, rounds):  # pragma: no cover
    """Where in the step local component ``j`` first falls through ``level``, given the
    first of the even points below it (``first``, from :func:`_first_fall`), as
    ``crossings.crossing_positions``."""
    lo = max(first - 1, 0) / looks
    hi = first / looks
    for _ in range(rounds):
        chosen = refine - 1
        for i in range(1, refine):
            point = lo + (i / refine) * (hi - lo)
            if _own(Q, x, hc, j, point) < level:
                chosen = i - 1
                break
        new_hi = hi
        if chosen < refine - 1:
            new_hi = lo + ((chosen + 1) / refine) * (hi - lo)
        if chosen > 0:
            lo = lo + (chosen / refine) * (hi - lo)
        hi = new_hi
    return hi


@jit(parallel=True)
def step_ends(y_prev, y, above, level, near, now, crossed, close):  # pragma: no cover
    """The whole network's step from ``y_prev`` to ``y`` against the threshold ``level``, in
    one pass on numba's threads, as :func:`trophoscape.integrate.ode.simulate` does it in
    numpy: ``now`` (at or above it at the end), ``crossed`` (``above`` at the start, not
    ``now``), ``close`` (not crossed, and within ``near`` of it, as a share, at either end;
    False where either end is NaN, as with ``np.minimum``); returns how many are close."""
    upper = (1.0 + near) * level  # the lower end below this, the higher above lower
    lower = (1.0 - near) * level
    count = 0
    for c in numba.prange(y.size):
        a = y_prev[c]
        b = y[c]
        now[c] = b >= level
        crossed[c] = above[c] and not now[c]
        is_close = False
        if not crossed[c] and a == a and b == b:
            is_close = min(a, b) < upper and max(a, b) > lower
        close[c] = is_close
        count += 1 if is_close else 0
    return count


@jit(parallel=True)
def falls_between(close, above, level, kind, y_old, coef, h, grid,
                  crossed):  # pragma: no cover - compiled
    """Marks in ``crossed`` the ``close`` components that fall through ``level`` on the whole
    step's interpolant (kind ``kind``, :func:`_interpolant`) at the points ``grid`` (0 to 1):
    a point below it after one at or above it, or after the start where ``above``; as
    :func:`trophoscape.integrate.crossings.falls_through_within`, value for value."""
    for c in numba.prange(close.size):
        if not close[c]:
            continue
        seen = above[c]
        for k in range(grid.size):
            v = _interpolant(kind, y_old, coef, h, c, grid[k])
            if k > 0 and v < level and seen:
                crossed[c] = True
                break
            if v >= level:
                seen = True


@jit
def _derivative(b, s, m, t, t0, span, xs, out, gout, xc,
                w_ptr, w_idx, w_val, p_old, p_coef, i_ptr, i_src, i_rate, kind, y_old,
                coef, whole_h, sends, comps, growth, response, harvest, patches, area,
                block):  # pragma: no cover
    """The derivative of group ``[b, b + s)`` (both species; local order prey then
    predator) at time ``t`` and state ``xs``, and what it sends minus the step's course.

    The immigrants from outside are one polynomial per component (``p_old``, ``p_coef``:
    the sources that stay positive over the whole step, summed) plus the links from the
    others (``i_ptr, i_src, i_rate``; ``i_src`` the network's components), each clipped at
    zero. ``y_old, coef`` are the whole step's interpolant over the network (kind ``kind``,
    :func:`_interpolant`); ``comps`` and ``patches`` the region's components and patches in
    the network's numbering; ``area`` and ``block`` the network's."""
    theta = (t - t0) / span
    for j in range(2 * s):
        xc[j] = clipped(xs[j])
    for i in range(s):
        p = patches[b + i]
        out[i], out[s + i] = local_one(growth, response, harvest, xc[i], xc[s + i],
                                       area[p], block, p)
    for j in range(2 * s):
        c = b + j if j < s else m + b + (j - s)
        within = 0.0
        for k in range(np.uintp(w_ptr[c]), np.uintp(w_ptr[c + 1])):
            col = w_idx[k]
            local = col - b if col < m else col - m - b + s
            within += w_val[k] * xc[np.uintp(local)]
        inflow = _interpolant(kind, p_old, p_coef, whole_h, c, theta)
        for k in range(np.uintp(i_ptr[c]), np.uintp(i_ptr[c + 1])):
            inflow += i_rate[k] * clipped(_interpolant(kind, y_old, coef, whole_h, i_src[k],
                                                       theta))
        out[j] = out[j] + within + inflow
        if sends:
            gout[j] = xc[j] - clipped(_interpolant(kind, y_old, coef, whole_h, comps[c],
                                                   theta))


@jit(parallel=True)
def run_groups(starts, m, t0, span, x, q, armed_in, level, rtol, atol,
               w_ptr, w_idx, w_val, p_old, p_coef, i_ptr, i_src, i_rate, kind, y_old, coef,
               whole_h, sends, comps, growth, response, harvest, patches, area, block,
               census, census_out, counts, held, A, B, C, E, P,
               safety, min_factor, max_factor, exponent, near, looks, refine, rounds,
               status, evaluations):  # pragma: no cover - compiled
    """Integrate every group of a region over the step ``t0 -> t0 + span``.

    ``x``, ``q`` (the region's state and what it sent, minus the step's course), ``counts``,
    ``held``, ``census_out`` (census values, ``(len(census), 2 m)``), ``status`` and
    ``evaluations`` (per group) are written in place; the components of group ``g`` are
    ``starts[g]:starts[g + 1]`` and the same plus ``m``. The links and immigrants are
    :func:`region_setup`'s.
    """
    groups = starts.size - 1
    stages = B.size
    t1 = t0 + span
    tiny = 1e-12 * span
    for g in numba.prange(groups):
        b = starts[g]
        s = starts[g + 1] - b
        size = 2 * s
        xl = np.empty(size)
        ql = np.empty(size)
        armed = np.empty(size, dtype=np.bool_)
        for j in range(size):
            c = b + j if j < s else m + b + (j - s)
            xl[j] = x[c]
            ql[j] = q[c]
            armed[j] = armed_in[c]
        K = np.empty((stages + 1, size))
        G = np.empty((stages + 1, size))
        xs = np.empty(size)
        x_new = np.empty(size)
        xc = np.empty(size)
        Q = np.empty((size, 4))
        QG = np.empty((size, 4))
        crossed = np.zeros(size, dtype=np.bool_)
        where = np.empty(size)
        fall = np.empty(size, dtype=np.int64)
        t = t0
        h = span
        rejected = False
        stale = True
        next_census = 0
        outcome = TOO_MANY_STEPS
        for _ in range(MAX_STEPS):
            if not t < t1 - tiny:
                outcome = DONE
                break
            step = min(h, t1 - t)
            if t1 - (t + step) <= tiny:
                step = t1 - t
            hc = step
            if stale:
                _derivative(b, s, m, t, t0, span, xl, K[0], G[0], xc, w_ptr, w_idx, w_val,
                            p_old, p_coef, i_ptr, i_src, i_rate, kind, y_old, coef, whole_h,
                            sends, comps, growth, response, harvest, patches, area, block)
                evaluations[g] += size
                stale = False
            for st in range(1, stages):
                for j in range(size):
                    acc = 0.0
                    for l in range(st):
                        acc += K[l, j] * A[st, l]
                    xs[j] = xl[j] + acc * hc
                _derivative(b, s, m, t + C[st] * step, t0, span, xs, K[st], G[st], xc,
                            w_ptr, w_idx, w_val, p_old, p_coef, i_ptr, i_src, i_rate, kind,
                            y_old, coef, whole_h, sends, comps, growth, response, harvest,
                            patches, area, block)
                evaluations[g] += size
            for j in range(size):
                acc = 0.0
                for l in range(stages):
                    acc += K[l, j] * B[l]
                x_new[j] = xl[j] + hc * acc
            _derivative(b, s, m, t + step, t0, span, x_new, K[stages], G[stages], xc,
                        w_ptr, w_idx, w_val, p_old, p_coef, i_ptr, i_src, i_rate, kind,
                        y_old, coef, whole_h, sends, comps, growth, response, harvest,
                        patches, area, block)
            evaluations[g] += size
            err = 0.0
            for j in range(size):
                acc = 0.0
                for l in range(stages + 1):
                    acc += K[l, j] * E[l]
                scale = atol + rtol * max(abs(xl[j]), abs(x_new[j]))
                e = abs(hc * acc) / scale
                if e != e:  # NaN (0/0 where atol = 0)
                    err = np.inf
                elif e > err:
                    err = e
            if not np.isfinite(err) and step <= tiny:
                outcome = NOT_A_NUMBER
                break
            accept = err < 1.0 or step <= tiny
            factor = safety * max(err, 1e-30) ** exponent
            grow = min(max_factor, factor)
            shrink = max(min_factor, min(1.0, factor))
            if rejected:
                grow = min(1.0, grow)
            if accept:
                h = step * grow
                rejected = False
            else:
                h = step * shrink
                rejected = True
                continue
            # the accepted step's own interpolant, x + h sum_j Q_j pos**(j + 1)
            for j in range(size):
                for i in range(4):
                    acc = 0.0
                    for l in range(stages + 1):
                        acc += K[l, j] * P[l, i]
                    Q[j, i] = acc
            cut = np.inf
            any_crossed = False
            for j in range(size):
                crossed[j] = False
                where[j] = np.inf
                if armed[j] and x_new[j] < level:
                    crossed[j] = True
                    f = _first_fall(Q, xl, hc, j, level, armed[j], looks)
                    fall[j] = f if f >= 0 else looks
                elif (min(xl[j], x_new[j]) < (1.0 + near) * level
                      and max(xl[j], x_new[j]) > (1.0 - near) * level):
                    fall[j] = _first_fall(Q, xl, hc, j, level, armed[j], looks)
                    crossed[j] = fall[j] >= 0
                any_crossed = any_crossed or crossed[j]
            # the first crossing, found by narrowing only the brackets that can hold it: a
            # bracket that starts at or after a crossing found has none before it (the
            # others keep where = inf; they are found again from the step's new start)
            if any_crossed:
                for k in range(1, looks + 1):
                    if (k - 1) / looks >= cut:
                        break
                    for j in range(size):
                        if crossed[j] and fall[j] == k:
                            where[j] = _crossing(Q, xl, hc, j, level, k, looks, refine, rounds)
                            if where[j] < cut:
                                cut = where[j]
            cut_here = np.isfinite(cut)
            end = t + (cut if cut_here else 1.0) * step
            # census times the step passes (one at a crossing: after the removal)
            passed = next_census
            while passed < census.size and (census[passed] < end
                                            or (not cut_here and census[passed] == end)):
                passed += 1
            for k in range(next_census, passed):
                pos = (census[k] - t) / (hc if hc > 0 else 1.0)
                pos = min(max(pos, 0.0), 1.0)
                for j in range(size):
                    c = b + j if j < s else m + b + (j - s)
                    census_out[k, c] = _own(Q, xl, hc, j, pos)
            next_census = passed
            if not cut_here:
                for j in range(size):
                    xl[j] = x_new[j]
                    K[0, j] = K[stages, j]
                    if sends:
                        acc = 0.0
                        for l in range(stages):
                            acc += G[l, j] * B[l]
                        ql[j] = ql[j] + hc * acc
                        G[0, j] = G[stages, j]
            else:
                for j in range(size):
                    y_cut = _own(Q, xl, hc, j, cut)
                    falling = (armed[j] and y_cut < level) or (crossed[j] and where[j] == cut)
                    if sends:  # the quadrature on its own interpolant
                        for i in range(4):
                            acc = 0.0
                            for l in range(stages + 1):
                                acc += G[l, j] * P[l, i]
                            QG[j, i] = acc
                        ql[j] = _own(QG, ql, hc, j, cut)
                    if falling:
                        c = b + j if j < s else m + b + (j - s)
                        counts[c] += 1
                        held[c] += y_cut
                        y_cut = 0.0
                    xl[j] = y_cut
                stale = True
            for j in range(size):
                armed[j] = xl[j] >= level
            t = end
        status[g] = outcome
        for j in range(size):
            c = b + j if j < s else m + b + (j - s)
            x[c] = xl[j]
            q[c] = ql[j]


@jit
def _groups(patches, l_ptr, l_idx, position):  # pragma: no cover - compiled
    """The connected groups of ``patches`` by the links among them (the CSR ``l_ptr, l_idx``
    over the network's patches): a label per patch, 0, 1, ... in the order each group's first
    patch comes in ``patches``, and their number. ``position`` is a work array over the
    network's components, -1 everywhere on entry and on return."""
    m = patches.size
    for i in range(m):
        position[patches[i]] = i
    parent = np.arange(m)
    for i in range(m):
        p = patches[i]
        for e in range(np.uintp(l_ptr[p]), np.uintp(l_ptr[p + 1])):
            j = position[np.uintp(l_idx[e])]
            if j < 0:
                continue
            a = i
            while parent[a] != a:  # the roots, halving the paths
                parent[a] = parent[parent[a]]
                a = parent[a]
            b = j
            while parent[b] != b:
                parent[b] = parent[parent[b]]
                b = parent[b]
            if a < b:  # the root is the group's first patch
                parent[b] = a
            elif b < a:
                parent[a] = b
    for i in range(m):
        position[patches[i]] = -1
    label = np.empty(m, dtype=np.int64)
    count = 0
    for i in range(m):
        a = i
        while parent[a] != a:
            a = parent[a]
        if a == i:
            label[i] = count
            count += 1
        else:
            label[i] = label[a]
    return label, count


@jit(parallel=True)
def region_setup(patches, n, l_ptr, l_idx, mv_ptr, mv_idx, mv_val, position, kind, y_old,
                 coef, h, parts):  # pragma: no cover - compiled
    """What :func:`run_groups` needs of a region of ``patches`` (increasing): as
    ``retake._Region`` builds it in numpy, in one pass.

    The patches are put in the order of their connected groups (by the links ``l_ptr,
    l_idx``), increasing within each. Of the region's rows of the movement operator (the
    CSR ``mv_ptr, mv_idx, mv_val``, entries with a zero rate skipped: no link), the links
    within the region are kept in the region's numbering (``w_ptr, w_idx, w_val``); those
    in from sources whose interpolant stays positive over the whole step (``y_old - |coef|
    sum > 0``, times ``h`` for kind 0) are summed into one polynomial per component
    (``p_old, p_coef``), in the order of the rows; the others are kept (``i_ptr, i_src,
    i_rate``, sources in the network's numbering).

    The rows are shared out in ``parts`` runs of rows on numba's threads, each written to
    its own stretch of the buffers, which are then closed up: every row is built as in one
    pass, so the result does not depend on ``parts`` (or the number of threads).

    Returns ``patches`` in group order, the groups' starts, the region's components in
    the network's numbering (those patches, then the same plus ``n``), and the arrays
    named above.
    """
    label, count = _groups(patches, l_ptr, l_idx, position)
    m = patches.size
    starts = np.zeros(count + 1, dtype=np.int64)
    for i in range(m):
        starts[label[i] + 1] += 1
    for g in range(count):
        starts[g + 1] += starts[g]
    fill = starts[:-1].copy()
    order = np.empty(m, dtype=np.int64)
    for i in range(m):
        order[fill[label[i]]] = patches[i]
        fill[label[i]] += 1
    comps = np.empty(2 * m, dtype=np.int64)
    for i in range(m):
        comps[i] = order[i]
        comps[m + i] = order[i] + n
    # the rows in parts, each with its own stretch of the buffers (its rows' entries)
    bound = np.empty(parts + 1, dtype=np.int64)
    for p in range(parts + 1):
        bound[p] = (2 * m * p) // parts
    room = np.zeros(parts + 1, dtype=np.int64)
    for p in numba.prange(parts):
        k = 0
        for c in range(bound[p], bound[p + 1]):
            position[comps[c]] = c
            k += mv_ptr[comps[c] + 1] - mv_ptr[comps[c]]
        room[p + 1] = k
    for p in range(parts):
        room[p + 1] += room[p]
    total = room[parts]
    terms = coef.shape[1]
    w_ptr = np.zeros(2 * m + 1, dtype=np.int64)
    w_idx = np.empty(total, dtype=np.int64)
    w_val = np.empty(total)
    i_ptr = np.zeros(2 * m + 1, dtype=np.int64)
    i_src = np.empty(total, dtype=np.int64)
    i_rate = np.empty(total)
    p_old = np.zeros(2 * m)
    p_coef = np.zeros((2 * m, terms))
    w_end = np.empty(parts, dtype=np.int64)
    i_end = np.empty(parts, dtype=np.int64)
    for p in numba.prange(parts):
        nw = room[p]
        ni = room[p]
        for c in range(bound[p], bound[p + 1]):
            r = comps[c]
            for e in range(np.uintp(mv_ptr[r]), np.uintp(mv_ptr[r + 1])):
                rate = mv_val[e]
                if rate == 0.0:
                    continue
                col = np.uintp(mv_idx[e])
                local = position[col]
                if local >= 0:
                    w_idx[nw] = local
                    w_val[nw] = rate
                    nw += 1
                    continue
                spread = 0.0
                for j in range(terms):
                    spread += abs(coef[col, j])
                if kind == 0:
                    spread = h * spread
                if y_old[col] - spread > 0.0:
                    p_old[c] += rate * y_old[col]
                    for j in range(terms):
                        p_coef[c, j] += rate * coef[col, j]
                else:
                    i_src[ni] = col
                    i_rate[ni] = rate
                    ni += 1
            w_ptr[c + 1] = nw
            i_ptr[c + 1] = ni
        w_end[p] = nw
        i_end[p] = ni
    # the parts' stretches closed up
    nw = w_end[0]
    ni = i_end[0]
    for p in range(1, parts):
        w_shift = room[p] - nw
        i_shift = room[p] - ni
        for k in range(room[p], w_end[p]):
            w_idx[k - w_shift] = w_idx[k]
            w_val[k - w_shift] = w_val[k]
        for k in range(room[p], i_end[p]):
            i_src[k - i_shift] = i_src[k]
            i_rate[k - i_shift] = i_rate[k]
        for c in range(bound[p], bound[p + 1]):
            w_ptr[c + 1] -= w_shift
            i_ptr[c + 1] -= i_shift
        nw += w_end[p] - room[p]
        ni += i_end[p] - room[p]
    for c in numba.prange(2 * m):
        position[comps[c]] = -1
    return (order, starts, comps, w_ptr, w_idx[:nw].copy(), w_val[:nw].copy(), p_old, p_coef,
            i_ptr, i_src[:ni].copy(), i_rate[:ni].copy())


@jit(parallel=True)
def corrections(members, n, t_ptr, t_idx, t_val, sent, mark, position,
                apart):  # pragma: no cover - compiled
    """What the components of the region's ``members`` (patches, increasing) sent out
    (``sent``, over the network's components, minus the step's course) along their links
    to components outside (the CSR ``t_ptr, t_idx, t_val``: the movement operator's
    transpose): the components reached (increasing) and the change of each, summed in the
    order of the region's components (prey, then predators) and of the rows' entries.
    ``mark`` (False) and ``position`` (-1) are work arrays over the network's components,
    left as they came.

    ``apart``: the prey's links reach only prey and the predators' only predators (the
    movement operator is block diagonal, as :class:`trophoscape.model.system.CoupledSystem`
    builds it); the two species are then done on two of numba's threads, each in its own
    half of the work arrays, with the same sums in the same order as in one pass."""
    m = members.size
    for i in range(m):
        mark[members[i]] = True
        mark[members[i] + n] = True
    parts = 2 if apart else 1
    found = np.zeros(parts, dtype=np.int64)
    for part in numba.prange(parts):
        first = part if apart else 0
        last = part + 1 if apart else 2
        k = 0
        for half in range(first, last):
            for i in range(m):
                c = members[i] + half * n
                for e in range(np.uintp(t_ptr[c]), np.uintp(t_ptr[c + 1])):
                    col = np.uintp(t_idx[e])
                    if not mark[col] and position[col] == -1:
                        position[col] = -2
                        k += 1
        found[part] = k
    total = found.sum()
    targets = np.empty(total, dtype=np.int64)
    for part in numba.prange(parts):
        j = 0 if part == 0 else found[0]
        lo = 0 if part == 0 else n
        hi = n if apart and part == 0 else 2 * n
        for col in range(lo, hi):
            if position[col] == -2:
                position[col] = j
                targets[j] = col
                j += 1
    change = np.zeros(total)
    for part in numba.prange(parts):
        first = part if apart else 0
        last = part + 1 if apart else 2
        for half in range(first, last):
            for i in range(m):
                c = members[i] + half * n
                for e in range(np.uintp(t_ptr[c]), np.uintp(t_ptr[c + 1])):
                    col = np.uintp(t_idx[e])
                    if not mark[col]:
                        change[np.uintp(position[col])] += t_val[e] * sent[c]
    for i in numba.prange(total):
        position[targets[i]] = -1
    for i in range(m):
        mark[members[i]] = False
        mark[members[i] + n] = False
    return targets, change


@jit
def joined(members, new, l_ptr, l_idx, position, mark):  # pragma: no cover - compiled
    """The ``members`` (patches, increasing) in the connected groups that hold any of
    ``new`` (the groups by the links ``l_ptr, l_idx``); work arrays as in
    :func:`corrections`."""
    label, count = _groups(members, l_ptr, l_idx, position)
    hit = np.zeros(count, dtype=np.bool_)
    for p in new:
        mark[p] = True
    size = 0
    for i in range(members.size):
        if mark[members[i]]:
            hit[label[i]] = True
    for p in new:
        mark[p] = False
    for i in range(members.size):
        if hit[label[i]]:
            size += 1
    out = np.empty(size, dtype=np.int64)
    k = 0
    for i in range(members.size):
        if hit[label[i]]:
            out[k] = members[i]
            k += 1
    return out
