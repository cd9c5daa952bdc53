"""Closed-form one-compartment kinetics for intravenous doses (pure numpy).

Everything here takes and returns plain numbers or numpy arrays in canonical
units (h, mg, L, mg/L, L/h, mg/h, 1/h) and broadcasts.  Nothing here knows about
units, files or pydantic; validation happens at the boundary (``schema``,
``units``).

The body is one well-stirred compartment of volume ``V`` cleared at rate
``CL``: ``V dC/dt = input(t) - CL C``.  A constant-rate infusion ``R0`` is a
step input into the first-order system ``G(s) = (1/CL) / (1 + (V/CL) s)``:
gain ``1/CL``, time constant ``tau = V/CL = 1/k``, plateau ``R0/CL``.  Doses
superpose because the system is linear.

References
----------
.. [1] Gibaldi M, Perrier D. *Pharmacokinetics*, 2nd ed. Marcel Dekker, 1982,
       ch. 1-3 (one-compartment model, constant-rate infusion, multiple dosing).
.. [2] Bourne DWA. *Basic Pharmacokinetics*, ch. 6 (intravenous infusion).
.. [3] Bauer LA. *Applied Clinical Pharmacokinetics*, ch. 2 (intermittent
       infusion steady-state equations) -- from memory.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "INITIAL_LEVEL",
    "LN2",
    "EventCells",
    "amount_to_reach",
    "area_by_mass_balance",
    "bolus_concentration",
    "concentration",
    "concentration_and_gradient",
    "concentration_derivatives",
    "concentration_repeated",
    "derived_parameters",
    "event_cells",
    "event_geometry",
    "expand_doses",
    "fraction_of_plateau",
    "plateau_concentration",
    "rate_for_plateau",
    "resolve_clearance_volume",
    "single_infusion_concentration",
    "split_events",
    "steady_state_intermittent",
    "steady_state_periodic",
    "steady_state_profile",
    "time_to_fall",
    "time_to_fraction",
    "two_compartment_and_gradient",
    "two_compartment_concentration",
    "two_compartment_macro",
]

LN2 = float(np.log(2.0))

#: Duration code of an *initial-level* event: its ``amount`` is a concentration
#: (mg/L) present at ``start`` that decays with the patient's ``k`` from there
#: (``C0 exp(-k (t - start))``; residual drug from earlier therapy).  Only arrays
#: handed to :func:`concentration` and :func:`concentration_and_gradient` carry it.
INITIAL_LEVEL = -1.0

#: Shortest duration (h) evaluated as an infusion; a shorter one is a bolus (3.6
#: microseconds: the two forms agree to about k x duration relative).
SHORTEST_INFUSION = 1e-9

#: Times x events evaluated at once by :func:`concentration` for one long history
#: (larger problems are done in blocks of times, so memory stays bounded).
CHUNK_CELLS = 1_000_000


def _infused_fraction(k, u, duration):
    """``(1 - exp(-k u)) / (k d)`` for infusions, 1 for boluses (``d = 0``).

    Written with ``expm1`` so that long half-lives (small ``k u``) keep full
    relative precision.
    """
    kd = k * duration
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = -np.expm1(-k * u) / kd
    return np.where(duration > 0, frac, 1.0)


def derived_parameters(clearance, volume):
    """Elimination rate, half-life and time constant from clearance and volume.

    ``k = CL / V``, ``t½ = ln 2 / k``, ``tau = V / CL = 1 / k`` [1]_.

    Parameters
    ----------
    clearance : float or ndarray, L/h
    volume : float or ndarray, L

    Returns
    -------
    dict of str to float or ndarray
        ``clearance`` (L/h), ``volume`` (L), ``elimination_rate`` (1/h),
        ``half_life`` (h), ``time_constant`` (h).

    References
    ----------
    .. [1] Gibaldi & Perrier, *Pharmacokinetics*, 2nd ed., ch. 1.

    Examples
    --------
    >>> p = derived_parameters(4.0, 40.0)
    >>> round(p["half_life"], 4)
    6.9315
    """
    clearance = np.asarray(clearance, dtype=float)
    volume = np.asarray(volume, dtype=float)
    k = clearance / volume
    out = {
        "clearance": clearance,
        "volume": volume,
        "elimination_rate": k,
        "half_life": LN2 / k,
        "time_constant": volume / clearance,
    }
    if all(np.ndim(v) == 0 for v in out.values()):
        return {key: float(v) for key, v in out.items()}
    return out


def resolve_clearance_volume(
    *, clearance=None, volume=None, half_life=None, elimination_rate=None, time_constant=None
):
    """Clearance and volume from any two of the five one-compartment parameters.

    ``k = CL/V = ln 2 / t½ = 1 / tau``.  Among ``half_life``,
    ``elimination_rate`` and ``time_constant`` only one is used (they all fix
    ``k``); consistency of over-determined input is checked at the boundary.

    Parameters
    ----------
    clearance : float or ndarray, L/h, optional
    volume : float or ndarray, L, optional
    half_life : float or ndarray, h, optional
    elimination_rate : float or ndarray, 1/h, optional
    time_constant : float or ndarray, h, optional

    Returns
    -------
    clearance, volume : float or ndarray
        L/h and L.

    Raises
    ------
    ValueError
        When the given parameters do not fix both clearance and volume.

    Examples
    --------
    >>> float(resolve_clearance_volume(clearance=4.2, half_life=8.0)[1])  # doctest: +ELLIPSIS
    48.47...
    """
    k = None
    if elimination_rate is not None:
        k = np.asarray(elimination_rate, dtype=float)
    elif half_life is not None:
        k = LN2 / np.asarray(half_life, dtype=float)
    elif time_constant is not None:
        k = 1.0 / np.asarray(time_constant, dtype=float)
    if clearance is not None and volume is not None:
        return clearance, volume
    if clearance is not None and k is not None:
        return clearance, clearance / k
    if volume is not None and k is not None:
        return k * volume, volume
    raise ValueError(
        "need two of clearance, volume and one of half_life / elimination_rate / time_constant"
    )


def expand_doses(start, amount, duration, every=None, count=None):
    """Expand repeated dose events into single events (vectorised, no loop).

    Event ``i`` is given ``count[i]`` times at ``start[i] + j * every[i]``,
    ``j = 0 .. count[i] - 1``.

    Parameters
    ----------
    start, amount, duration : array_like, shape (n,), h, mg, h
    every : array_like, shape (n,), h, optional
        Interval between repeats (ignored where ``count == 1``).
    count : array_like of int, shape (n,), optional
        Number of doses (1 when omitted).

    Returns
    -------
    start, amount, duration : ndarray, shape (sum(count),)
        Single events sorted by start time.

    Examples
    --------
    >>> expand_doses([0.0], [100.0], [0.5], every=[8.0], count=[3])[0]
    array([ 0.,  8., 16.])
    """
    start = np.atleast_1d(np.asarray(start, dtype=float))
    amount = np.atleast_1d(np.asarray(amount, dtype=float))
    duration = np.atleast_1d(np.asarray(duration, dtype=float))
    if count is None:
        return _sorted_events(start, amount, duration)
    count = np.atleast_1d(np.asarray(count, dtype=np.int64))
    every = np.zeros_like(start) if every is None else np.atleast_1d(np.asarray(every, float))
    every = np.where(np.isnan(every), 0.0, every)
    owner = np.repeat(np.arange(start.size), count)
    first = np.cumsum(count) - count
    j = np.arange(owner.size) - first[owner]
    return _sorted_events(start[owner] + j * every[owner], amount[owner], duration[owner])


def _sorted_events(start, amount, duration):
    order = np.argsort(start, kind="stable")
    return start[order], amount[order], duration[order]


def concentration(t, start, amount, duration, clearance, volume):
    """Concentration after any set of bolus and zero-order infusion events.

    Superposition of closed-form single-event responses [1]_ [2]_.  For an
    event starting at ``s`` with amount ``A`` infused over ``d`` (``d = 0`` is a
    bolus), with ``k = CL/V``, ``u = clip(t - s, 0, d)`` the time infused so far
    and ``w = t - s - u`` the time since the infusion ended::

        C(t) = sum_events  A / (V k d) * (1 - exp(-k u)) * exp(-k w)     (d > 0)
        C(t) = sum_events  A / V * exp(-k (t - s))                         (d = 0)
        C(t) = sum_events  C0 exp(-k (t - s))                              (initial level)

    for ``t >= s`` and 0 before (an initial-level event has ``duration =
    INITIAL_LEVEL`` and its ``amount`` is the level ``C0`` in mg/L).  During an
    infusion this is
    ``(R0/CL)(1 - exp(-k (t - s)))`` with ``R0 = A/d``; after it,
    ``C(end) exp(-k (t - end))``.  The result is right-continuous: a bolus at
    ``t`` is included at ``t``.

    Parameters
    ----------
    t : array_like, shape (..., T), h
        Times.
    start, amount, duration : array_like, shape (..., E), h, mg, h
        Single dose events (see :func:`expand_doses` for repeats).  Pad ragged
        event lists with ``amount = 0``.
    clearance : float or array_like, shape (...), L/h
    volume : float or array_like, shape (...), L

    Returns
    -------
    ndarray, shape (..., T), mg/L

    References
    ----------
    .. [1] Gibaldi & Perrier, *Pharmacokinetics*, 2nd ed., ch. 1-2.
    .. [2] Bourne, *Basic Pharmacokinetics*, ch. 6.

    Examples
    --------
    >>> c = concentration([8.0], [0.0], [240.0], [240.0 / 30.0], 3.0, 34.62)
    >>> round(float(c[0]), 3)  # 30 mg/h for 8 h, CL 3 L/h, t½ 8 h: half of 10 mg/L
    5.0
    """
    t = np.asarray(t, dtype=float)
    n_events = np.shape(start)[-1] if np.ndim(start) else 1
    if t.ndim == 1 and np.ndim(start) == 1 and np.ndim(clearance) == 0 \
            and t.size * n_events > CHUNK_CELLS:
        # one long history: evaluate in blocks of times so memory stays bounded
        step = max(1, CHUNK_CELLS // n_events)
        return np.concatenate([concentration(t[i:i + step], start, amount, duration,
                                             clearance, volume)
                               for i in range(0, t.size, step)])
    u, w, active = event_geometry(t, start, duration)
    return _sum_events(_event_terms(u, w, active, amount, duration, clearance, volume)[0])


def _sum_events(x: np.ndarray) -> np.ndarray:
    """Sum over the last (event) axis; a matrix product with ones is several times
    faster than ``x.sum(axis=-1)`` for short last axes."""
    if x.shape[-1] == 1:
        return x[..., 0]
    return x @ np.ones(x.shape[-1])


def _event_terms(u, w, active, amount, duration, clearance, volume):
    """Each event's contribution ``coef (1 - exp(-k u)) exp(-k w)`` (or the bolus and
    initial-level forms), and the pieces the gradient reuses."""
    amount = np.asarray(amount, dtype=float)[..., None, :]
    duration = np.asarray(duration, dtype=float)[..., None, :]
    clearance = np.asarray(clearance, dtype=float)[..., None, None]
    volume = np.asarray(volume, dtype=float)[..., None, None]
    k = clearance / volume
    # an "infusion" shorter than SHORTEST_INFUSION is a bolus (the two forms differ by
    # about k d relative; A/(V k d) itself would overflow for a vanishing d)
    infusion = (duration > SHORTEST_INFUSION).astype(float)
    bolus = ((duration >= 0) & (duration <= SHORTEST_INFUSION)).astype(float)
    point = 1.0 - infusion  # bolus or initial level: no infusion phase
    # A/(V k d) for infusions, A/V for boluses, C0 for an initial level; zero before the start
    denom = infusion * volume * k * duration + bolus * volume + (point - bolus)
    coef = active * amount / denom
    e_w = np.exp(-k * w)
    em1 = np.expm1(-k * u)
    # (1 - exp(-k u)) for infusions; 1 for the others (u is 0 there, so em1 is 0)
    return coef * (point - em1) * e_w, (coef, k, e_w, em1, bolus, infusion, point)


def event_geometry(t, start, duration):
    """Parts of the single-event response that do not depend on the parameters.

    Parameters
    ----------
    t : array_like, shape (..., T), h
    start, duration : array_like, shape (..., E), h

    Returns
    -------
    u, w : ndarray, shape (..., T, E), h
        Time infused so far, ``clip(t - s, 0, d)``, and time since the infusion
        ended, ``t - s - u`` (0 before the event).
    active : ndarray of bool, shape (..., T, E)
        ``t >= s``.
    """
    t = np.asarray(t, dtype=float)[..., :, None]
    start = np.asarray(start, dtype=float)[..., None, :]
    duration = np.asarray(duration, dtype=float)[..., None, :]
    dt = t - start
    u = np.clip(dt, 0.0, np.maximum(duration, 0.0))
    return u, np.maximum(dt - u, 0.0), dt >= 0


@dataclass(frozen=True)
class EventCells:
    """The (time, event) pairs of padded rows that contribute anything, flat.

    A row of a study with many doses and few levels has mostly empty pairs in the
    padded ``(rows, times, events)`` layout -- an event after the time, or padding --
    so the model is evaluated on the contributing pairs only and summed into each
    row's times (``numpy.bincount``).  Made by :func:`event_cells`; taken by
    :func:`concentration_and_gradient` and :func:`concentration_derivatives` as
    ``geometry``.

    Attributes
    ----------
    u, w : ndarray, shape (C,), h
        As in :func:`event_geometry`, for each contributing pair.
    amount, duration : ndarray, shape (C,)
        The pair's event.
    row, slot : ndarray of int, shape (C,)
        The pair's row, and its position ``row * n_times + time`` in the flattened
        output.
    counts : ndarray of int, shape (B,)
        Pairs per row (the pairs are stored row after row).
    n_times : int
    """

    u: np.ndarray
    w: np.ndarray
    amount: np.ndarray
    duration: np.ndarray
    row: np.ndarray
    slot: np.ndarray
    counts: np.ndarray
    n_times: int

    def rows(self, idx: np.ndarray) -> EventCells:
        """The cells of rows ``idx`` (in that order; a row may repeat)."""
        idx = np.asarray(idx, dtype=np.int64)
        counts = self.counts[idx]
        first = (np.cumsum(self.counts) - self.counts)[idx]
        new_first = np.cumsum(counts) - counts
        total = int(counts.sum())
        pos = np.arange(total) + np.repeat(first - new_first, counts)
        row = np.repeat(np.arange(idx.size), counts)
        slot = row * self.n_times + (self.slot[pos] - self.row[pos] * self.n_times)
        return EventCells(self.u[pos], self.w[pos], self.amount[pos], self.duration[pos],
                          row, slot, counts, self.n_times)

    def total(self, x: np.ndarray) -> np.ndarray:
        """Per-pair values summed into each row's times, shape (B, n_times)."""
        b = self.counts.size
        return np.bincount(self.slot, weights=x.reshape(-1),
                           minlength=b * self.n_times).reshape(b, self.n_times)

    def parameters(self, clearance, volume):
        """Each pair's clearance and volume (from one per row)."""
        b = self.counts.size
        cl = np.broadcast_to(np.asarray(clearance, dtype=float), (b,))[self.row]
        v = np.broadcast_to(np.asarray(volume, dtype=float), (b,))[self.row]
        return cl, v


def event_cells(t, start, amount, duration, geometry=None) -> EventCells:
    """The contributing (time, event) pairs of padded rows (:class:`EventCells`): the
    event has started by the time (``t >= start``) and has a non-zero amount.

    Parameters
    ----------
    t : array_like, shape (B, T), h
    start, amount, duration : array_like, shape (B, E)
    geometry : tuple, optional
        :func:`event_geometry` of the same arrays, when already computed.
    """
    amount = np.asarray(amount, dtype=float)
    duration = np.asarray(duration, dtype=float)
    u, w, active = geometry if geometry is not None else event_geometry(t, start, duration)
    b, n = u.shape[:2]
    r, i, j = np.nonzero(active & (amount[:, None, :] != 0))
    return EventCells(u[r, i, j], w[r, i, j], amount[r, j], duration[r, j], r, r * n + i,
                      np.bincount(r, minlength=b), n)


def _layout(t, start, amount, duration, clearance, volume, geometry):
    """``(u, w, active, amount, duration, clearance, volume, total)`` for the event
    terms: broadcast over padded (..., T, E) arrays, or flat over :class:`EventCells`
    (``total`` sums the terms into the times)."""
    if isinstance(geometry, EventCells):
        cl, v = geometry.parameters(clearance, volume)
        return (geometry.u[:, None, None], geometry.w[:, None, None], 1.0,
                geometry.amount[:, None], geometry.duration[:, None], cl, v, geometry.total)
    u, w, active = geometry if geometry is not None else event_geometry(t, start, duration)
    return u, w, active, amount, duration, clearance, volume, _sum_events


def concentration_and_gradient(t, start, amount, duration, clearance, volume, *,
                               geometry=None):
    """Concentration and its analytic derivatives with respect to ``ln CL`` and ``ln V``.

    With ``k = CL/V`` each event term is ``C_e = coef * g(k)``: for an infusion
    ``coef = A/(CL d)``, ``g = (1 - exp(-k u)) exp(-k w)``; for a bolus
    ``coef = A/V``, ``g = exp(-k (t - s))`` (see :func:`concentration`).  With
    ``D = k dC_e/dk``::

        infusion:  dC/d lnCL = -C_e + D,   dC/d lnV = -D
        bolus:     dC/d lnCL = D,          dC/d lnV = -C_e - D

    and ``k g'(k)`` written with ``expm1`` for precision:
    ``g'(k) = exp(-k w) [u exp(-k u) + w expm1(-k u)]`` (infusion),
    ``-(t - s) exp(-k (t - s))`` (bolus).

    Parameters
    ----------
    t : array_like, shape (..., T), h
    start, amount, duration : array_like, shape (..., E)
    clearance, volume : array_like, shape (...)
    geometry : tuple or EventCells, optional
        ``(u, w, active)`` from :func:`event_geometry` for these times and events,
        to skip recomputing it when only the parameters change (fitting); or their
        contributing pairs (:func:`event_cells`; rows of shape (B, T), one clearance
        and volume per row).

    Returns
    -------
    conc : ndarray, shape (..., T), mg/L
    grad : ndarray, shape (2, ..., T)
        ``grad[0] = dC/d ln CL`` and ``grad[1] = dC/d ln V``.
    """
    u, w, active, amount, duration, clearance, volume, total = _layout(
        t, start, amount, duration, clearance, volume, geometry)
    term, (coef, k, e_w, em1, bolus, infusion, point) = _event_terms(
        u, w, active, amount, duration, clearance, volume)
    # k g'(k); for boluses and initial levels u = em1 = 0 and the first part vanishes
    d_term = coef * k * e_w * (u * (1.0 + em1) + w * em1 - point * w)
    conc, d = total(term), total(d_term)
    c_inf, _, c_bol, _ = _by_kind(total, term, None, conc, None, amount, infusion, bolus)
    # initial level (coef = C0, no V): dC/d lnCL = D, dC/d lnV = -D
    grad = np.stack([d - c_inf, -c_bol - d])
    return conc, grad


def _by_kind(total, term, d_term, conc, d, amount, infusion, bolus):
    """The infusions' and the boluses' parts of ``total(term)`` and ``total(d_term)``
    (``conc`` and ``d``): the per-event factors of the derivatives differ by kind, and
    the sums are linear, so each kind is summed once and the factors applied after.
    Where every dosing event is an infusion (the usual study), or every one a bolus,
    one kind's parts are the totals themselves and no extra sum is taken; ``d_term``
    None skips its parts."""
    used = np.asarray(amount, dtype=float)[..., None, :] != 0
    if np.all((infusion > 0) | ~used):
        return conc, d, 0.0, 0.0
    if np.all((bolus > 0) | ~used):
        return 0.0, 0.0, conc, d
    return (total(infusion * term), None if d_term is None else total(infusion * d_term),
            total(bolus * term), None if d_term is None else total(bolus * d_term))


def concentration_derivatives(t, start, amount, duration, clearance, volume, *,
                              geometry=None):
    """Concentration with its first and second derivatives in ``ln CL`` and ``ln V``.

    With ``x = ln CL``, ``y = ln V``, ``k = CL/V`` and each event term
    ``C_e = coef g(k)`` as in :func:`concentration_and_gradient`, write
    ``a_x = d ln coef / dx`` (-1 for an infusion, 0 otherwise), ``a_y = d ln coef / dy``
    (-1 for a bolus, 0 otherwise), ``D = coef k g'(k)`` and ``D2 = coef k^2 g''(k)``.
    Since ``dk/dx = k = -dk/dy``::

        dC/dx = a_x C + D                 dC/dy = a_y C - D
        d2C/dx2 = a_x^2 C + (2 a_x + 1) D + D2
        d2C/dxdy = (a_y - a_x - 1) D - D2          (a_x a_y = 0)
        d2C/dy2 = a_y^2 C + (1 - 2 a_y) D + D2

    with ``k^2 g''(k) = k^2 exp(-k w) [-u (u + 2 w) exp(-k u) - w^2 expm1(-k u)]`` for
    an infusion (``g = exp(-k w) - exp(-k (u + w))``) and ``k^2 w^2 exp(-k w)`` for a
    bolus or an initial level (``u = 0``).  Used where a Newton step needs the exact
    Hessian of an objective (the conditional modes of the population estimates).

    Parameters
    ----------
    As :func:`concentration_and_gradient`.

    Returns
    -------
    conc : ndarray, shape (..., T), mg/L
    grad : ndarray, shape (2, ..., T)
        ``dC/d ln CL``, ``dC/d ln V``.
    hess : ndarray, shape (3, ..., T)
        ``d2C/d ln CL2``, ``d2C/d ln CL d ln V``, ``d2C/d ln V2``.
    """
    u, w, active, amount, duration, clearance, volume, total = _layout(
        t, start, amount, duration, clearance, volume, geometry)
    term, (coef, k, e_w, em1, bolus, infusion, point) = _event_terms(
        u, w, active, amount, duration, clearance, volume)
    ck = coef * k * e_w
    one_em1 = 1.0 + em1
    d_term = ck * (u * one_em1 + w * em1 - point * w)
    d2_term = ck * k * (point * w * w - u * (u + 2.0 * w) * one_em1 - w * w * em1)
    # with a_x = -[infusion] and a_y = -[bolus] per event, summed by kind (_by_kind)
    conc, d, d2 = total(term), total(d_term), total(d2_term)
    c_inf, d_inf, c_bol, d_bol = _by_kind(total, term, d_term, conc, d, amount, infusion,
                                          bolus)
    grad = np.stack([d - c_inf, -c_bol - d])
    hess = np.stack([c_inf + d - 2.0 * d_inf + d2, d_inf - d_bol - d - d2,
                     c_bol + d + 2.0 * d_bol + d2])
    return conc, grad, hess


def concentration_repeated(t, dose, duration, interval, clearance, volume, count=None):
    """Concentration under a regular train of equal doses, in closed form.

    Doses of ``dose`` infused over ``duration <= interval`` at times
    ``0, interval, 2 interval, ...`` (``count`` of them, unlimited when
    ``None``).  With ``x = t``, ``m`` doses started by ``x`` (at most ``count``),
    ``y = x - (m-1) tau`` the time since the last started dose and
    ``P = dose/V (1 - exp(-k d))/(k d)`` the level at the end of one infusion::

        C(t) = c1(y) + P exp(-k (y + tau - d)) (1 - exp(-k (m-1) tau)) / (1 - exp(-k tau))

    where ``c1`` is the single-dose response.  This is the multiple-dosing
    geometric series of [1]_ (ch. 3); it equals :func:`concentration` on the
    expanded events.

    Parameters
    ----------
    t : array_like, h
        Times after the first dose; broadcast with the other arguments.
    dose : array_like, mg
    duration : array_like, h
        Infusion time of each dose (0 for boluses); must not exceed ``interval``.
    interval : array_like, h
    clearance : array_like, L/h
    volume : array_like, L
    count : array_like of int, optional
        Number of doses; ``None`` for an unending train.

    Returns
    -------
    ndarray, mg/L

    References
    ----------
    .. [1] Gibaldi & Perrier, *Pharmacokinetics*, 2nd ed., ch. 3.

    Examples
    --------
    >>> float(concentration_repeated(0.0, 100.0, 0.0, 12.0, 5.0, 50.0))
    2.0
    """
    t, dose, duration, interval, clearance, volume = np.broadcast_arrays(
        *(np.asarray(a, dtype=float) for a in (t, dose, duration, interval, clearance, volume))
    )
    k = clearance / volume
    started = np.floor(t / interval) + 1.0
    if count is not None:
        started = np.minimum(started, np.asarray(count, dtype=float))
    started = np.maximum(started, 0.0)
    y = t - (started - 1.0) * interval
    peak_one = dose / volume * _infused_fraction(k, duration, duration)
    u = np.clip(y, 0.0, duration)
    w = np.maximum(y - u, 0.0)
    current = dose / volume * _infused_fraction(k, u, duration) * np.exp(-k * w)
    with np.errstate(invalid="ignore", divide="ignore"):
        series = np.expm1(-k * (started - 1.0) * interval) / np.expm1(-k * interval)
    earlier = peak_one * np.exp(-k * (y + interval - duration)) * series
    out = np.where(started >= 2, current + earlier, current)
    return np.where(t >= 0, out, 0.0)


def plateau_concentration(rate, clearance):
    """Plateau (steady-state) concentration of a constant-rate infusion.

    ``Css = R0 / CL`` [1]_.

    Parameters
    ----------
    rate : float or ndarray, mg/h
    clearance : float or ndarray, L/h

    Returns
    -------
    float or ndarray, mg/L

    References
    ----------
    .. [1] Bourne, *Basic Pharmacokinetics*, ch. 6; Gibaldi & Perrier, ch. 2.

    Examples
    --------
    >>> float(plateau_concentration(30.0, 3.0))
    10.0
    """
    return np.asarray(rate, dtype=float) / np.asarray(clearance, dtype=float) + 0.0


def time_to_fraction(fraction, clearance, volume):
    """Time for a constant-rate infusion to reach a fraction of its plateau.

    ``t_f = -ln(1 - f) V / CL = -ln(1 - f) / k`` (from ``C/Css = 1 - exp(-k t)``,
    [1]_).  In half-lives: ``-log2(1 - f)``; 0.5 -> 1, 0.9 -> 3.32, 0.99 -> 6.64.

    Parameters
    ----------
    fraction : float or ndarray
        In (0, 1).
    clearance : float or ndarray, L/h
    volume : float or ndarray, L

    Returns
    -------
    float or ndarray, h

    References
    ----------
    .. [1] Gibaldi & Perrier, *Pharmacokinetics*, 2nd ed., ch. 2.

    Examples
    --------
    >>> round(float(time_to_fraction(0.5, 1.0, 8.0 / LN2)), 6)
    8.0
    """
    fraction = np.asarray(fraction, dtype=float)
    return -np.log1p(-fraction) * np.asarray(volume, float) / np.asarray(clearance, float) + 0.0


def fraction_of_plateau(t, clearance, volume):
    """Fraction of its plateau a constant-rate infusion started from zero reaches after
    ``t``: ``1 - exp(-k t)`` (the inverse of :func:`time_to_fraction`; Gibaldi & Perrier,
    ch. 2).

    Examples
    --------
    >>> round(float(fraction_of_plateau(8.0, 1.0, 8.0 / LN2)), 6)
    0.5
    """
    k = np.asarray(clearance, float) / np.asarray(volume, float)
    return -np.expm1(-k * np.asarray(t, float)) + 0.0


def steady_state_intermittent(dose, duration, interval, clearance, volume):
    """Steady-state peak, trough and average of repeated short infusions.

    For ``dose`` infused over ``T = duration`` every ``tau = interval``
    (``T <= tau``), with ``k = CL/V`` and ``k0 = dose/T`` [1]_ [2]_::

        peak    = k0 (1 - exp(-k T)) / (V k (1 - exp(-k tau)))   (end of infusion)
        trough  = peak exp(-k (tau - T))                           (just before a dose)
        average = dose / (CL tau)

    A bolus (``T = 0``) gives ``peak = (dose/V) / (1 - exp(-k tau))``.

    Parameters
    ----------
    dose : float or ndarray, mg
    duration : float or ndarray, h
    interval : float or ndarray, h
    clearance : float or ndarray, L/h
    volume : float or ndarray, L

    Returns
    -------
    peak, trough, average : float or ndarray, mg/L

    References
    ----------
    .. [1] Bauer, *Applied Clinical Pharmacokinetics*, ch. 2 -- from memory.
    .. [2] Gibaldi & Perrier, *Pharmacokinetics*, 2nd ed., ch. 3.

    Examples
    --------
    >>> [round(float(x), 3) for x in steady_state_intermittent(100.0, 0.0, 8.0, 5.0, 40.0)]
    [3.955, 1.455, 2.5]
    """
    dose, duration, interval, clearance, volume = (
        np.asarray(a, dtype=float) for a in (dose, duration, interval, clearance, volume)
    )
    k = clearance / volume
    peak = dose / volume * _infused_fraction(k, duration, duration) / -np.expm1(-k * interval)
    trough = peak * np.exp(-k * (interval - duration))
    average = dose / (clearance * interval)
    return peak + 0.0, trough + 0.0, average + 0.0


def steady_state_profile(phase, offset, amount, duration, interval, clearance, volume, left=False):
    """Periodic steady-state concentration of events repeated every ``interval``.

    Each event ``e`` (amount ``A``, infusion time ``d <= tau``) recurs at
    ``offset + j tau`` forever.  At phase ``theta`` within the interval, with
    ``y = (theta - offset) mod tau`` and ``P = A/V (1 - exp(-k d))/(k d)``::

        Css(theta) = sum_e  c1(y) + P exp(-k (y + tau - d)) / (1 - exp(-k tau))

    (the infinite geometric series of [1]_, ch. 3).  With ``left=True`` the
    limit from the left is returned at event starts (``y = tau`` instead of 0),
    i.e. the trough just before a dose.

    Parameters
    ----------
    phase : array_like, shape (..., P), h
    offset, amount, duration : array_like, shape (..., E), h, mg, h
    interval : float or array_like, shape (...), h
    clearance, volume : float or array_like, shape (...), L/h, L
    left : bool

    Returns
    -------
    ndarray, shape (..., P), mg/L

    References
    ----------
    .. [1] Gibaldi & Perrier, *Pharmacokinetics*, 2nd ed., ch. 3.
    """
    phase = np.asarray(phase, dtype=float)[..., :, None]
    offset = np.asarray(offset, dtype=float)[..., None, :]
    amount = np.asarray(amount, dtype=float)[..., None, :]
    duration = np.asarray(duration, dtype=float)[..., None, :]
    interval = np.asarray(interval, dtype=float)[..., None, None]
    volume = np.asarray(volume, dtype=float)[..., None, None]
    k = np.asarray(clearance, dtype=float)[..., None, None] / volume
    y = np.mod(phase - offset, interval)
    if left:
        y = np.where(y <= 0, interval, y)
    u = np.clip(y, 0.0, duration)
    w = np.maximum(y - u, 0.0)
    current = amount / volume * _infused_fraction(k, u, duration) * np.exp(-k * w)
    peak_one = amount / volume * _infused_fraction(k, duration, duration)
    earlier = peak_one * np.exp(-k * (y + interval - duration)) / -np.expm1(-k * interval)
    return (current + earlier).sum(axis=-1)


def steady_state_periodic(offset, amount, duration, interval, clearance, volume):
    """Peak, trough and average of the periodic steady state of repeated events.

    Between event boundaries the steady-state curve is ``a + b exp(-k theta)``,
    hence monotone, so its extremes lie at event starts and ends; both one-sided
    limits are evaluated there.  Average = ``sum(A) / (CL tau)`` [1]_.

    Parameters
    ----------
    offset, amount, duration : array_like, shape (E,), h, mg, h
        Events of one interval (``duration <= interval``).
    interval : float, h
    clearance, volume : float, L/h, L

    Returns
    -------
    peak, trough, average : float, mg/L

    References
    ----------
    .. [1] Gibaldi & Perrier, *Pharmacokinetics*, 2nd ed., ch. 3.
    """
    offset = np.mod(np.atleast_1d(np.asarray(offset, dtype=float)), interval)
    duration = np.atleast_1d(np.asarray(duration, dtype=float))
    amount = np.atleast_1d(np.asarray(amount, dtype=float))
    marks = np.mod(np.concatenate([offset, offset + duration]), interval)
    args = (offset, amount, duration, interval, clearance, volume)
    values = np.concatenate(
        [steady_state_profile(marks, *args), steady_state_profile(marks, *args, left=True)]
    )
    average = amount.sum() / (clearance * interval)
    return float(values.max()), float(values.min()), float(average)


def split_events(start, amount, duration, at):
    """Split single dose events at time ``at``: what was given before it and after it.

    An infusion running at ``at`` is cut there: the part infused before ``at``
    (``rate x (at - start)``) stays in the first set, the rest starts at ``at``
    in the second.  A bolus at exactly ``at`` belongs to the second set.  The
    concentration is the sum of both sets' responses (superposition), so
    ``before`` alone is the course when every dose from ``at`` on is withheld.

    Parameters
    ----------
    start, amount, duration : array_like, shape (E,), h, mg, h
        Single events (see :func:`expand_doses`).
    at : float, h

    Returns
    -------
    before, after : tuple of three ndarrays
        ``(start, amount, duration)`` of each set; empty arrays where none.

    Examples
    --------
    >>> b, a = split_events([0.0], [100.0], [10.0], 4.0)
    >>> float(b[1][0]), float(b[2][0]), float(a[0][0]), float(a[1][0])
    (40.0, 4.0, 4.0, 60.0)
    """
    start = np.atleast_1d(np.asarray(start, dtype=float))
    amount = np.atleast_1d(np.asarray(amount, dtype=float))
    duration = np.atleast_1d(np.asarray(duration, dtype=float))
    infusing = duration > 0
    given = np.clip(at - start, 0.0, np.maximum(duration, 0.0))
    frac = np.where(infusing, given / np.where(infusing, duration, 1.0), 0.0)
    frac = np.where(infusing, frac, (start < at).astype(float))
    frac = np.where(duration < 0, (start <= at).astype(float), frac)  # initial levels stay
    pre = frac > 0
    post = frac < 1
    before = (start[pre], (amount * frac)[pre], np.where(infusing, given, duration)[pre])
    after_start = np.where(infusing, np.maximum(start, at), start)
    after = (after_start[post], (amount * (1.0 - frac))[post],
             np.where(infusing, duration - given, duration)[post])
    return before, after


def area_by_mass_balance(infused, c_start, c_end, clearance, volume):
    """Area under the concentration curve between two times, by mass balance.

    Integrating ``V dC/dt = input(t) - CL C`` from ``t1`` to ``t2``::

        AUC(t1, t2) = (input - V (C(t2) - C(t1))) / CL

    where ``input`` is the drug amount that entered in between [1]_ (ch. 1).  At
    steady state over one interval this is ``dose / CL``; over 24 h of a
    regimen at steady state, ``daily dose / CL``.

    Parameters
    ----------
    infused : float or ndarray, mg
    c_start, c_end : float or ndarray, mg/L
    clearance : float or ndarray, L/h
    volume : float or ndarray, L

    Returns
    -------
    float or ndarray, mg h/L

    References
    ----------
    .. [1] Gibaldi & Perrier, *Pharmacokinetics*, 2nd ed., ch. 1.

    Examples
    --------
    >>> float(area_by_mass_balance(2400.0, 10.0, 10.0, 100.0, 50.0))  # 24 h at plateau
    24.0
    """
    return (np.asarray(infused, float) - np.asarray(volume, float)
            * (np.asarray(c_end, float) - np.asarray(c_start, float))) \
        / np.asarray(clearance, float) + 0.0


def amount_to_reach(target, current, clearance, volume, duration):
    """Amount that, infused over ``duration`` from a level ``current``, ends at ``target``.

    With nothing else given, ``C(T) = current exp(-kT) + A/(CL T) (1 - exp(-kT))``,
    so::

        A = (target - current exp(-kT)) CL T / (1 - exp(-kT))      (T > 0)
        A = (target - current) V                                    (T = 0, a bolus)

    The bolus form is the incremental loading dose (Winter, *Basic Clinical
    Pharmacokinetics* -- from memory); with ``current = 0`` the infusion form is
    the loading infusion that reaches the target at its end.  A negative result
    means the level is already above where the target asks it to be.

    Parameters
    ----------
    target, current : float or ndarray, mg/L
    clearance : float or ndarray, L/h
    volume : float or ndarray, L
    duration : float or ndarray, h

    Returns
    -------
    float or ndarray, mg of drug

    Examples
    --------
    >>> float(amount_to_reach(10.0, 4.0, 3.0, 35.0, 0.0))
    210.0
    """
    target, current, clearance, volume, duration = (
        np.asarray(a, dtype=float) for a in (target, current, clearance, volume, duration))
    k = clearance / volume
    kt = k * duration
    with np.errstate(invalid="ignore", divide="ignore"):
        infused = (target - current * np.exp(-kt)) * clearance * duration / -np.expm1(-kt)
    return np.where(duration > 0, infused, (target - current) * volume) + 0.0


def time_to_fall(level_now, level_wanted, clearance, volume):
    """Time for the level to fall from ``level_now`` to ``level_wanted`` with no input.

    ``t = ln(Cnow / Cwanted) / k`` (first-order decline; the pause before a lower
    rate, Bauer, *Applied Clinical Pharmacokinetics* -- from memory).

    Examples
    --------
    >>> round(float(time_to_fall(8.0, 4.0, 1.0, 8.0 / LN2)), 6)  # one half-life
    8.0
    """
    return np.log(np.asarray(level_now, float) / np.asarray(level_wanted, float)) \
        * np.asarray(volume, float) / np.asarray(clearance, float) + 0.0


def rate_for_plateau(target, clearance):
    """Infusion rate that holds a plateau: ``R0 = Css CL`` (Bourne, ch. 6).

    Examples
    --------
    >>> float(rate_for_plateau(10.0, 2.8))
    28.0
    """
    return np.asarray(target, float) * np.asarray(clearance, float) + 0.0


def single_infusion_concentration(t, rate, duration, clearance, volume):
    """Concentration at ``t`` of one constant-rate infusion from time 0 lasting
    ``duration`` (``inf`` for no end): ``(R0/CL)(1 - exp(-k u)) exp(-k (t - u))`` with
    ``u = min(t, duration)`` the time infused so far (the event form of
    :func:`concentration`, broadcasting over rows).

    Examples
    --------
    >>> round(float(single_infusion_concentration(8.0, 30.0, np.inf, 3.0, 8 * 3.0 / LN2)), 6)
    5.0
    """
    t, rate, duration, clearance, volume = (np.asarray(a, float) for a in
                                            (t, rate, duration, clearance, volume))
    k = clearance / volume
    on = np.minimum(t, duration)
    return rate / clearance * -np.expm1(-k * on) * np.exp(-k * (t - on)) + 0.0


def bolus_concentration(t, amount, clearance, volume):
    """Concentration at ``t`` after a bolus at time 0: ``(A/V) exp(-k t)`` (``t >= 0``).

    Examples
    --------
    >>> float(bolus_concentration(0.0, 350.0, 3.0, 35.0))
    10.0
    """
    t, amount, clearance, volume = (np.asarray(a, float) for a in (t, amount, clearance,
                                                                    volume))
    return amount / volume * np.exp(-clearance / volume * t) + 0.0


# --------------------------------------------------------------------------- two compartments
# Used only by the adequacy check (a sensitivity check beside the one-compartment fit,
# never a second modelling path).  Central volume V1, peripheral volume V2,
# inter-compartmental clearance Q:  V1 dC1/dt = input - CL C1 - Q C1 + Q C2,
# V2 dC2/dt = Q C1 - Q C2.


def two_compartment_macro(clearance, central_volume, intercompartmental, peripheral_volume):
    """Macro-constants of the two-compartment model from its micro-constants.

    With ``k10 = CL/V1``, ``k12 = Q/V1``, ``k21 = Q/V2``, the disposition rates
    are the roots of ``x^2 - (k10 + k12 + k21) x + k10 k21 = 0``:
    ``alpha > beta > 0``; a unit bolus gives ``C1(t) = (c_alpha e^(-alpha t) +
    c_beta e^(-beta t)) / V1`` with ``c_alpha = (alpha - k21) / (alpha - beta)``
    and ``c_beta = 1 - c_alpha`` (Gibaldi & Perrier, ch. 2 -- from memory).

    Returns
    -------
    alpha, beta : ndarray, 1/h
    c_alpha, c_beta : ndarray
        Fractions of ``D/V1`` in the fast and slow exponentials.

    Examples
    --------
    >>> a, b, ca, cb = two_compartment_macro(5.0, 10.0, 10.0, 40.0)
    >>> round(float(a * b), 6) == round(0.5 * 0.25, 6)       # alpha beta = k10 k21
    True
    """
    cl, v1, q, v2 = (np.asarray(x, float) for x in (clearance, central_volume,
                                                     intercompartmental, peripheral_volume))
    k10, k12, k21 = cl / v1, q / v1, q / v2
    s = k10 + k12 + k21
    root = np.sqrt(np.maximum(s * s - 4 * k10 * k21, 0.0))
    alpha = 0.5 * (s + root)
    beta = k10 * k21 / alpha                  # the small root without cancellation
    spread = np.maximum(alpha - beta, 1e-300)
    c_alpha = (alpha - k21) / spread
    return alpha, beta, c_alpha, 1.0 - c_alpha


def two_compartment_concentration(t, start, amount, duration, clearance, central_volume,
                                  intercompartmental, peripheral_volume):
    """Central concentration after any bolus / infusion events, two compartments.

    Each exponential of the unit response behaves like a one-compartment body
    with rate ``alpha`` (or ``beta``) and volume ``V1``, so by superposition::

        C(t) = c_alpha * C_1cmt(t; CL = alpha V1, V = V1)
             + c_beta  * C_1cmt(t; CL = beta  V1, V = V1)

    with :func:`concentration` as ``C_1cmt``.  An initial-level event puts
    ``C0`` in the central compartment with an empty periphery.  Shapes as in
    :func:`concentration`.

    Examples
    --------
    >>> c = two_compartment_concentration([0.0], [0.0], [100.0], [0.0], 5.0, 10.0, 10.0, 40.0)
    >>> float(c[0])                                          # D / V1 at the bolus
    10.0
    """
    return two_compartment_and_gradient(t, start, amount, duration, clearance, central_volume,
                                        intercompartmental, peripheral_volume,
                                        gradient=False)[0]


def two_compartment_and_gradient(t, start, amount, duration, clearance, central_volume,
                                 intercompartmental, peripheral_volume, *, geometry=None,
                                 gradient: bool = True):
    """Central concentration and its derivatives with respect to ``ln CL, ln V1, ln Q,
    ln V2``.

    With the decomposition of :func:`two_compartment_concentration` and
    ``g_x = (dC_1cmt/d ln CL, dC_1cmt/d ln V)`` at ``(x V1, V1)``::

        dC = (C_a - C_b) dc_alpha + sum_x c_x [g_x0 (d ln x + d ln V1) + g_x1 d ln V1]

    where ``alpha, beta = (s +- r)/2``, ``s = k10 + k12 + k21``,
    ``r = sqrt(s^2 - 4 k10 k21)``, so ``d alpha = (ds + (s ds - 2 dp)/r)/2``
    (``p = k10 k21``), ``d beta = ds - d alpha`` and
    ``d c_alpha = (d alpha - d k21)/r - (alpha - k21) dr / r^2``.

    Returns
    -------
    conc : ndarray, shape (..., T)
    grad : ndarray, shape (4, ..., T) or None
    """
    cl, v1, q, v2 = (np.asarray(x, float) for x in (clearance, central_volume,
                                                     intercompartmental, peripheral_volume))
    alpha, beta, c_a, c_b = two_compartment_macro(cl, v1, q, v2)
    geom = geometry if geometry is not None else event_geometry(t, start, duration)
    c_fast, g_fast = concentration_and_gradient(t, start, amount, duration, alpha * v1, v1,
                                                geometry=geom)
    c_slow, g_slow = concentration_and_gradient(t, start, amount, duration, beta * v1, v1,
                                                geometry=geom)
    ca, cb = c_a[..., None], c_b[..., None]
    conc = ca * c_fast + cb * c_slow
    if not gradient:
        return conc, None
    k10, k12, k21 = cl / v1, q / v1, q / v2
    s = k10 + k12 + k21
    r = np.maximum(alpha - beta, 1e-300)
    # derivatives of k10, k12, k21 with respect to ln CL, ln V1, ln Q, ln V2
    zero = np.zeros_like(k10)
    dk10 = [k10, -k10, zero, zero]
    dk12 = [zero, -k12, k12, zero]
    dk21 = [zero, zero, k21, -k21]
    grads = []
    for j in range(4):
        ds = dk10[j] + dk12[j] + dk21[j]
        dp = dk10[j] * k21 + k10 * dk21[j]
        d_alpha = 0.5 * (ds + (s * ds - 2 * dp) / r)
        d_beta = ds - d_alpha
        dr = d_alpha - d_beta
        dca = (d_alpha - dk21[j]) / r - (alpha - k21) * dr / (r * r)
        dlnv1 = 1.0 if j == 1 else 0.0
        fast = g_fast[0] * (d_alpha / alpha + dlnv1)[..., None] + g_fast[1] * dlnv1
        slow = g_slow[0] * (d_beta / beta + dlnv1)[..., None] + g_slow[1] * dlnv1
        grads.append(dca[..., None] * (c_fast - c_slow) + ca * fast + cb * slow)
    return conc, np.stack(grads)
