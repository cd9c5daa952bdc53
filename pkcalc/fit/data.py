"""Subjects as one padded batch: BLQ handling, weights, levels before any drug, the prior."""

from __future__ import annotations

import math

import numpy as np

from .. import model
from ..core import FitOptions, SubjectData
from .objective import Batch


def subject_events(s: SubjectData) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A subject's dose events for the model, with its initial level (if any) as an
    initial-level event at time 0 (:data:`pkcalc.model.INITIAL_LEVEL`)."""
    if not s.initial_concentration:
        return s.dose_start, s.dose_amount, s.dose_duration
    return (np.append(s.dose_start, 0.0), np.append(s.dose_amount, s.initial_concentration),
            np.append(s.dose_duration, model.INITIAL_LEVEL))


def predictions_by_subject(batch: Batch, subjects: list[SubjectData], ln_cl: np.ndarray,
                           ln_v: np.ndarray, *, block: int = 50_000) -> dict[str, np.ndarray]:
    """Every subject's predicted levels at its own times (doses and initial level as in
    ``batch``, the padded batch of ``subjects``) for clearance ``exp(ln_cl[i])`` and
    volume ``exp(ln_v[i])``: one vectorised evaluation per block of rows of at most
    ``block`` level x dose cells."""
    n, width = batch.t.shape
    per = max(1, block // max(width * batch.start.shape[1], 1))
    out: dict[str, np.ndarray] = {}
    for i0 in range(0, n, per):
        sl = slice(i0, min(i0 + per, n))
        f = model.concentration(batch.t[sl], batch.start[sl], batch.amount[sl],
                                batch.duration[sl], np.exp(ln_cl[sl]), np.exp(ln_v[sl]))
        for s, row in zip(subjects[sl], f, strict=True):
            out[s.subject] = row[:s.time.size].copy()
    return out


def prepare_batch(subjects: list[SubjectData], opts: FitOptions):
    """All subjects as one padded batch after the BLQ method and the weights.

    Returns the batch, the data-handling notes of each subject (warnings as
    ``("warning", text)``) and the number of levels each one contributes.
    """
    t, y, lloq, blq, valid, start, amount, duration = _padded(subjects)
    notes: list[list] = [[] for _ in subjects]
    y, obs, cens = _blq_method(y, lloq, blq, valid, opts.blq, notes)
    dose = amount > 0
    infusion = dose & (duration > 0)
    instant = dose & ((duration == 0) | (duration == model.INITIAL_LEVEL))
    first_infusion = np.where(infusion, start, np.inf).min(axis=1, initial=np.inf)[:, None]
    first_instant = np.where(instant, start, np.inf).min(axis=1, initial=np.inf)[:, None]
    none_yet = valid & (t <= first_infusion) & (t < first_instant)
    _before_any_drug(subjects, t, y, obs, none_yet, notes)
    # a level years after the last dose is a time or unit gone wrong (common practice)
    ends = np.where(dose & (duration >= 0), start + np.maximum(duration, 0.0), -np.inf)
    gone = valid & ~none_yet & (t - ends.max(axis=1, initial=-np.inf)[:, None]
                                > FAR_AFTER_LAST_DOSE)
    _far_after(subjects, t, gone, notes)
    obs &= ~(none_yet | gone)
    cens &= ~(none_yet | gone)
    obs, w = _weights(y, obs, opts.weighting, notes)
    batch = Batch(t=t, y=y, w=w, obs=obs, cens=cens, start=start, amount=amount,
                  duration=duration, kind=opts.method, error=opts.error_model or "additive")
    return batch, notes, obs.sum(axis=1) + cens.sum(axis=1)


def _padded(subjects: list[SubjectData]):
    """Levels and dose events of every subject, padded to the longest."""
    b = len(subjects)
    n = max((s.time.size for s in subjects), default=1)
    events = [subject_events(s) for s in subjects]
    e = max((ev[0].size for ev in events), default=1)
    t = np.zeros((b, n))
    y = np.full((b, n), np.nan)
    lloq = np.full((b, n), np.nan)
    blq = np.zeros((b, n), bool)
    valid = np.zeros((b, n), bool)
    start, amount, duration = np.zeros((b, e)), np.zeros((b, e)), np.zeros((b, e))
    for i, s in enumerate(subjects):
        k = s.time.size
        t[i, :k], y[i, :k], lloq[i, :k], blq[i, :k], valid[i, :k] = (s.time, s.conc, s.lloq,
                                                                       s.blq, True)
        m = events[i][0].size
        start[i, :m], amount[i, :m], duration[i, :m] = events[i]
    return t, y, lloq, blq & valid, valid, start, amount, duration


def _blq_method(y, lloq, blq, valid, method: str, notes):
    """What BLQ levels become: dropped (M1), LLOQ/2, or censored (M3)."""
    obs = valid & ~blq
    cens = np.zeros_like(blq)
    if method == "half_lloq":
        y = np.where(blq, lloq / 2, y)
        obs = obs | blq
    elif method == "likelihood":
        y = np.where(blq, lloq, y)
        cens = blq.copy()
    text = {"drop": "BLQ level(s) dropped (Beal's M1)",
            "half_lloq": "BLQ level(s) set to LLOQ/2 (substitution, for comparison; Beal's "
                         "M5/M6 family)",
            "likelihood": "BLQ level(s) enter as P(C < LLOQ) (censored likelihood, "
                          "Beal's M3)"}[method]
    n_blq = blq.sum(axis=1)
    for i in np.flatnonzero(n_blq):
        notes[i].append(f"{int(n_blq[i])} {text}")
    return np.where(np.isnan(y), 0.0, y), obs, cens


def _before_any_drug(subjects, t, y, obs, none_yet, notes) -> None:
    """Levels where no drug has entered yet (before or at the start of the first
    infusion, and no initial level): the model predicts exactly zero there, so they
    carry no information on CL and V and would put a zero variance into the
    likelihood; they are left out, with a warning when measurable."""
    for i in np.flatnonzero(none_yet.any(axis=1)):
        k = subjects[i].time.size
        times = ", ".join(f"{x:g} h" for x in t[i, :k][none_yet[i, :k]])
        text = (f"level(s) at {times} drawn before any drug entered: the model predicts zero "
                "there, so they were left out of the fit")
        if (obs[i] & none_yet[i] & (y[i] > 0)).any():
            notes[i].insert(0, ("warning", text + "; a measurable level before the first "
                                "dose means drug on board from earlier therapy: give "
                                "initial_concentration"))
        else:
            notes[i].append(text)


#: A level drawn more than this after the end of the last dose (about 14 months) is
#: taken as a wrong time or unit and left out with a warning (common practice).
FAR_AFTER_LAST_DOSE = 10_000.0


def _far_after(subjects, t, gone, notes) -> None:
    """Levels drawn more than :data:`FAR_AFTER_LAST_DOSE` after the last dose."""
    for i in np.flatnonzero(gone.any(axis=1)):
        k = subjects[i].time.size
        times = ", ".join(f"{x:g} h" for x in t[i, :k][gone[i, :k]])
        notes[i].insert(0, ("warning", f"level(s) at {times}: more than "
                            f"{FAR_AFTER_LAST_DOSE:g} h after the last dose, left out of the "
                            "fit (a time or its unit wrong?)"))


def _weights(y, obs, weighting: str | None, notes):
    """Least-squares weights (1 everywhere unless 1/observed or 1/observed^2)."""
    w = np.ones_like(y)
    if weighting in ("inverse_observed", "inverse_observed_squared"):
        bad = obs & ~(y > 0)
        obs = obs & ~bad
        for i in np.flatnonzero(bad.any(axis=1)):
            notes[i].append(f"{int(bad[i].sum())} level(s) of zero left out: weights "
                            "1/observed need positive levels")
        power = 1.0 if weighting == "inverse_observed" else 2.0
        w = np.where(obs, np.abs(np.where(obs, y, 1.0)) ** -power, 0.0)
    return obs, w


def with_prior(batch: Batch, subjects: list[SubjectData], opts: FitOptions,
                prior_means: dict[str, tuple[float, float]] | None = None):
    prior = opts.prior
    assert prior is not None
    mu, bad = [], []
    for i, s in enumerate(subjects):
        if prior_means is not None and s.subject in prior_means:
            mu.append(list(prior_means[s.subject]))
            continue
        try:
            cl, v = prior.typical(s.weight)
        except ValueError:
            bad.append(i)
            cl, v = prior.clearance, prior.volume
        mu.append([math.log(cl), math.log(v)])
    mu = np.asarray(mu)
    oc, ov, r = prior.omega_clearance, prior.omega_volume, prior.correlation
    omega = np.array([[oc**2, r * oc * ov], [r * oc * ov, ov**2]])
    b = len(subjects)
    batch = Batch(**{**batch.__dict__, "kind": "map", "error": prior.error_model,
                     "sa": np.full(b, prior.additive), "sp": np.full(b, prior.proportional),
                     "mu": mu, "omega_inv": np.repeat(np.linalg.inv(omega)[None], b, axis=0)})
    info = {"mu": mu, "omega": np.repeat(omega[None], b, axis=0)}
    return batch, info, bad
