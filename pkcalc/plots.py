"""Matplotlib figures (Agg backend).  Functions return Figures; callers save them.

Every figure carries the short caution in its footer.  The look is plain and
greyscale-readable: black lines, grey bands, dashed reference lines.
"""

from __future__ import annotations

import io
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt
import numpy as np
from matplotlib.figure import Figure

from . import glossary, model
from .core import expand_events
from .report import CAUTION_SHORT, UnitConverter, write_atomic

__all__ = ["figure_bytes", "new_figure", "profile_figure", "save_figure"]


def new_figure(width: float = 7.5, height: float = 4.6) -> tuple[Figure, plt.Axes]:
    """A figure with one axis and the caution footer."""
    fig = Figure(figsize=(width, height), layout="constrained")
    ax = fig.add_subplot()
    fig.text(0.01, 0.005, CAUTION_SHORT, fontsize=6.5, color="0.25", ha="left", va="bottom")
    fig.get_layout_engine().set(rect=(0, 0.035, 1, 0.965))
    ax.grid(True, color="0.88", linewidth=0.6)
    return fig, ax


def plain_log_ticks(ax) -> None:
    """Tick labels of a log axis as plain numbers (2, 5, 10, 0.5), not "6x10^0"."""
    from matplotlib.ticker import FuncFormatter, LogLocator

    def label(value, _pos):
        return f"{value:g}"

    ax.yaxis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
    ax.yaxis.set_major_formatter(FuncFormatter(label))
    ax.yaxis.set_minor_formatter(FuncFormatter(lambda _v, _p: ""))


def figure_bytes(fig: Figure, fmt: str = "png") -> bytes:
    """The figure rendered to bytes (PNG or SVG)."""
    buf = io.BytesIO()
    fig.savefig(buf, format=fmt, dpi=120)
    return buf.getvalue()


def save_figure(fig: Figure, path: str | Path) -> Path:
    """Save atomically; the format follows the file suffix."""
    path = Path(path)
    return write_atomic(path, figure_bytes(fig, path.suffix.lstrip(".") or "png"))


def profile_figure(pred, conv: UnitConverter | None = None) -> Figure:
    """Concentration-time course of one scenario.

    Shows the plateau (dashed), the times to 50 % and 90 % of plateau counted
    from the first infusion start (dotted), the target window (grey band) and
    dose starts (ticks on the time axis).
    """
    from .predict import plot_grid

    conv = conv or UnitConverter()
    p = pred.parameters
    grid = plot_grid(pred.time, pred.doses)
    start = expand_events(pred.doses)[0]
    conc = model.concentration(grid, *pred.model_events(), p["clearance"], p["volume"])
    fig, ax = new_figure()
    ax.plot(conv(grid, "time"), conv(conc, "concentration"), color="black", lw=1.6,
            label="predicted concentration")
    target = pred.target
    if target is not None and target.low is not None:
        ax.axhspan(conv(target.low, "concentration"), conv(target.high, "concentration"),
                   color="0.85", zorder=0, label="target window")
    if target is not None and target.plateau is not None:
        ax.axhline(conv(target.plateau, "concentration"), color="0.4", lw=1.0, ls="-.",
                   label="target plateau")
    if pred.plateau_concentration is not None:
        ax.axhline(conv(pred.plateau_concentration, "concentration"), color="0.3", lw=1.0,
                   ls="--", label="plateau")
        infusions = [d.start for d in pred.doses if d.duration > 0]
        t0 = min(infusions) if infusions else 0.0
        for f, style in ((0.5, ":"), (0.9, "-.")):   # two styles a reader tells apart
            tf = t0 + pred.time_to_fraction.get(f, model.time_to_fraction(f, p["clearance"],
                                                                           p["volume"]))
            if tf <= grid[-1]:
                ax.axvline(conv(tf, "time"), color="0.35", lw=1.0, ls=style,
                           label=f"{f:.0%} of plateau ({conv(tf, 'time'):.3g} "
                                 f"{conv.unit('time')}, plain infusion)")
    ax.plot(conv(start, "time"), np.zeros_like(start), "|", color="0.2", ms=10,
            label="dose starts")
    ax.set_xlabel(glossary.axis("time", conv.unit("time")))
    ax.set_ylabel(glossary.axis("concentration", conv.unit("concentration")))
    ax.set_title(f"{pred.name}: one-compartment prediction", fontsize=10)
    ax.set_ylim(bottom=0)
    ax.legend(fontsize=7, loc="best", frameon=False)
    return fig


def design_figure(result, conv: UnitConverter | None = None) -> Figure | None:
    """Predicted course of each proposed regimen with the target window.

    Continuous designs: five half-lives after the loading dose.  Intermittent
    designs: until steady state (five half-lives, at least four intervals).
    Designs from levels: the recorded history and the measured levels, then each
    proposal's projected course from its start over the next 72 h.
    Returns None when clearance or volume is unknown (nothing to draw).
    """
    conv = conv or UnitConverter()
    cl, v = result.clearance, result.volume
    if not cl or not v or not result.regimens:
        return None
    fig, ax = new_figure(height=5.6)
    # proposals: solid lines told apart by grey and marker; dashed and dotted lines are
    # kept for the limits, so no proposal can be mistaken for one
    greys = ["black", "0.3", "0.45", "0.6"]
    marks = [None, "o", "s", "^"]
    shown = result.regimens[:4]
    state = getattr(result, "state", None)
    if state is not None:
        t_lo, tmax = _draw_history(ax, state, cl, v, conv)
    else:
        half_life = model.LN2 * v / cl
        t_lo = 0.0
        tmax = max(
            (max(5 * half_life, 4 * r.interval) + r.interval) if r.interval
            else (r.loading_time or 0.0) + 5 * half_life
            for r in shown
        )
    for i, reg in enumerate(shown):
        horizon = tmax - (state.start if state is not None else 0.0)
        events = reg.events(result.salt_factor, horizon)
        if not events:
            continue
        start, amount, duration = expand_events(events)
        t0 = state.start if state is not None else 0.0
        t = np.unique(np.concatenate([np.linspace(t0, tmax, 2000), start, start + duration]))
        t = t[(t >= t0) & (t <= tmax)]
        before = state.before if state is not None else (np.empty(0),) * 3
        allev = [np.concatenate([b, n]) for b, n in zip(before, (start, amount, duration),
                                                         strict=True)]
        c = model.concentration(t, *allev, cl, v)
        ax.plot(conv(t, "time"), conv(c, "concentration"), color=greys[i], ls="-",
                lw=1.6 if i == 0 else 1.1, marker=marks[i], markevery=max(t.size // 12, 1),
                ms=4, fillstyle="none", label=f"#{i + 1} {reg.label}")
    band = getattr(shown[0], "attainment", None)
    if band is not None and band.band:   # where the first proposal's course may really go
        b = band.band
        ax.fill_between(conv(np.asarray(b["time"]), "time"),
                        conv(np.asarray(b["q05"]), "concentration"),
                        conv(np.asarray(b["q95"]), "concentration"), color="0.8", alpha=0.6,
                        lw=0, zorder=1, label="#1: 5-95 % of the posterior")
    tgt = result.target
    window = tgt.get("window")
    if window and window[0] is not None and window[1] is not None:
        ax.axhspan(conv(window[0], "concentration"), conv(window[1], "concentration"),
                   color="0.88", zorder=0, label="target window")
    for key, label in (("peak_limits", "peak limits"), ("trough_limits", "trough limits")):
        lims = tgt.get(key) or [None, None]
        for j, x in enumerate(lims):
            if x is not None:
                ax.axhline(conv(x, "concentration"), color="0.45", lw=0.9,
                           ls=(0, (4, 2)) if key == "peak_limits" else (0, (1, 2)),
                           label=label if j == 0 or lims[0] is None else None)
    if tgt.get("plateau") is not None:
        ax.axhline(conv(tgt["plateau"], "concentration"), color="0.3", lw=0.9, ls="-.",
                   label="target plateau")
    ax.set_xlim(conv(t_lo, "time"), conv(tmax, "time") if tmax else None)
    ax.set_ylim(bottom=0)
    ax.set_xlabel(glossary.axis("time", conv.unit("time")))
    ax.set_ylabel(glossary.axis("concentration", conv.unit("concentration")))
    ax.set_title(f"{result.name}\nproposed regimens: a calculation, not an order", fontsize=9)
    # below the axes (and above the caution footer): the legend never covers a course
    ax.legend(fontsize=7, loc="upper center", bbox_to_anchor=(0.5, -0.11), ncol=2,
              frameon=False)
    return fig


def _draw_history(ax, state, cl, v, conv):
    """The recorded course up to the proposals' start (individual estimates), the
    measured levels, and a line at the start; returns the time span to draw."""
    hist_start = state.history[0]
    starts = [float(x) for x in np.concatenate([hist_start, state.before[0]])] or [0.0]
    t_lo = min(min(starts), *(t for t, _ in state.levels)) if state.levels else min(starts)
    t_lo = min(t_lo, state.start)
    t = np.linspace(t_lo, state.start, 800)
    marks = np.concatenate([state.before[0], state.before[0] + np.maximum(state.before[2], 0)])
    t = np.unique(np.concatenate([t, marks[(marks >= t_lo) & (marks <= state.start)]]))
    c = model.concentration(t, *state.before, cl, v)
    ax.plot(conv(t, "time"), conv(c, "concentration"), color="0.5", lw=1.2,
            label="course so far (individual estimates)")
    if state.levels:
        lt, lc = zip(*state.levels, strict=True)
        ax.plot(conv(np.array(lt), "time"), conv(np.array(lc), "concentration"), "o",
                color="black", ms=5, mfc="white", label="measured levels")
    ax.axvline(conv(state.start, "time"), color="0.3", lw=0.8, ls=":",
               label=f"proposals start ({conv(state.start, 'time'):.4g} {conv.unit('time')})")
    return t_lo, state.start + 72.0


def nca_figure(result, conv: UnitConverter | None = None) -> Figure | None:
    """Log-concentration vs time of one subject, the terminal points marked and the
    terminal regression line drawn."""
    conv = conv or UnitConverter()
    t, c = np.asarray(result.time), np.asarray(result.conc)
    keep = np.isfinite(c) & (c > 0)
    if not keep.any():
        return None
    fig, ax = new_figure(6.5, 4.2)
    tt = conv(t[keep], "time")
    ax.semilogy(tt, conv(c[keep], "concentration"), "o-", color="black", ms=4, lw=0.8,
                mfc="white", label="levels used")
    if result.points_used:
        pts = np.asarray(result.points_used)
        sel = np.isin(np.round(t, 9), np.round(pts, 9)) & keep
        ax.semilogy(conv(t[sel], "time"), conv(c[sel], "concentration"), "s", color="black",
                    ms=6, label="terminal points")
        if result.terminal_slope is not None and result.terminal_intercept is not None:
            ref = result.reference_time
            line_t = np.linspace(pts.min() - ref, t[keep].max() - ref, 50)
            line_c = np.exp(result.terminal_intercept - result.terminal_slope * line_t)
            ax.semilogy(conv(line_t + ref, "time"), conv(line_c, "concentration"), "--",
                        color="0.4", lw=1.0,
                        label=f"terminal slope (half-life {result.terminal_half_life:.3g} h)")
    ax.set_xlabel(glossary.axis("time", conv.unit("time")))
    ax.set_ylabel(f"concentration [{conv.unit('concentration')}] (log scale)")
    plain_log_ticks(ax)
    ax.set_title(f"subject {result.subject}: non-compartmental analysis ({result.mode})",
                 fontsize=9)
    ax.legend(fontsize=7, frameon=False)
    return fig


def fit_figure(result, conv: UnitConverter | None = None) -> Figure:
    """Observed levels and the fitted course of one subject, with the doses shown."""
    conv = conv or UnitConverter()
    t_end = max(float(np.nanmax(result.time)) * 1.05, 1e-3)
    starts = np.asarray(result.dose_start)
    ends = starts + np.asarray(result.dose_duration)
    grid = np.unique(np.concatenate([np.linspace(0, t_end, 800), starts, ends,
                                     starts[result.dose_duration == 0] - 1e-9 * t_end]))
    grid = grid[(grid >= 0) & (grid <= t_end)]
    fig, ax = new_figure(6.5, 4.2)
    ax.plot(conv(grid, "time"), conv(result.predict(grid), "concentration"), color="black",
            lw=1.4, label="fitted one-compartment course")
    a = getattr(result, "adequacy", None)
    if a is not None and a.verdict == "distribution_phase":
        ax.plot(conv(grid, "time"), conv(result.predict_two_exponential(grid), "concentration"),
                "--", color="0.35", lw=1.2, label="two-exponential fit (sensitivity check)")
        ax.text(0.99, 0.97, "distribution phase evident: one compartment not adequate",
                transform=ax.transAxes, ha="right", va="top", fontsize=7.5)
    meas = ~result.blq & np.isfinite(result.observed)
    ax.plot(conv(result.time[meas], "time"), conv(result.observed[meas], "concentration"), "o",
            color="black", mfc="white", ms=5, label="measured levels")
    if result.blq.any():
        lloq = result.observed[result.blq]
        ax.plot(conv(result.time[result.blq], "time"),
                conv(np.where(np.isfinite(lloq), lloq, 0.0), "concentration"), "v",
                color="0.4", ms=6, label="below LLOQ (drawn at the LLOQ)")
    for s, d in zip(starts, result.dose_duration, strict=True):
        if d > 0:
            ax.axvspan(conv(s, "time"), conv(s + d, "time"), ymax=0.04, color="0.55", lw=0)
        else:
            ax.plot([conv(s, "time")], [0], "^", color="0.3", ms=7, clip_on=False)
    cl, v = result.estimates["clearance"].value, result.estimates["volume"].value
    ax.set_title(f"subject {result.subject}: CL {cl:.3g} L/h, V {v:.3g} L "
                 f"({result.method.replace('_', ' ')})", fontsize=9)
    ax.set_xlabel(f"time [{conv.unit('time')}] (doses marked at the bottom)")
    ax.set_ylabel(glossary.axis("concentration", conv.unit("concentration")))
    ax.set_ylim(bottom=0)
    ax.legend(fontsize=7, frameon=False)
    return fig


def diagnostics_figure(results, conv: UnitConverter | None = None) -> Figure:
    """Observed vs predicted, weighted residuals vs time and vs prediction (all subjects)."""
    conv = conv or UnitConverter()
    fig = Figure(figsize=(10.5, 3.8), layout="constrained")
    axes = fig.subplots(1, 3)
    fig.text(0.01, 0.005, CAUTION_SHORT, fontsize=6.5, color="0.25")
    fig.get_layout_engine().set(rect=(0, 0.05, 1, 0.95))
    obs = np.concatenate([r.observed[~r.blq] for r in results]) if results else np.empty(0)
    pred = np.concatenate([r.predicted[~r.blq] for r in results]) if results else np.empty(0)
    time = np.concatenate([r.time[~r.blq] for r in results]) if results else np.empty(0)
    wres = np.concatenate([r.weighted_residuals[~r.blq] for r in results]) if results \
        else np.empty(0)
    ok = np.isfinite(obs) & np.isfinite(pred)
    ax = axes[0]
    ax.plot(conv(pred[ok], "concentration"), conv(obs[ok], "concentration"), "o", ms=3.5,
            color="black", mfc="white")
    top = float(np.nanmax(np.r_[obs[ok], pred[ok], 1e-9])) * 1.05
    ax.plot([0, conv(top, "concentration")], [0, conv(top, "concentration")], "--",
            color="0.4", lw=1)
    ax.set_xlabel(f"predicted [{conv.unit('concentration')}]")
    ax.set_ylabel(f"observed [{conv.unit('concentration')}]")
    ax.set_title("observed vs predicted", fontsize=9)
    for ax, x, label in ((axes[1], conv(time, "time"), glossary.axis("time", conv.unit("time"))),
                         (axes[2], conv(pred, "concentration"),
                          f"predicted [{conv.unit('concentration')}]")):
        okw = np.isfinite(wres) & np.isfinite(x)
        ax.plot(x[okw], wres[okw], "o", ms=3.5, color="black", mfc="white")
        ax.axhline(0, color="0.4", lw=1)
        for y in (-2, 2):
            ax.axhline(y, color="0.6", lw=0.8, ls=":")
        ax.set_xlabel(label)
        ax.set_ylabel("weighted residual")
        ax.set_title(f"weighted residuals vs {label.split(' [')[0]}", fontsize=9)
    for ax in axes:
        ax.grid(True, color="0.88", linewidth=0.6)
    return fig


def population_figure(result, subjects, conv: UnitConverter | None = None) -> Figure:
    """Observed vs population and individual predictions, individual weighted residuals
    vs time, and individual estimates vs body weight."""
    conv = conv or UnitConverter()
    fig = Figure(figsize=(10.5, 7.6), layout="constrained")
    fig.text(0.01, 0.005, CAUTION_SHORT, fontsize=6.5, color="0.25")
    fig.get_layout_engine().set(rect=(0, 0.03, 1, 0.97))
    axes = fig.subplots(2, 2)
    fits = {r.subject: r for r in result.subjects}
    obs, pred, ipred, time, cwres = [], [], [], [], []
    for s in subjects:
        r = fits.get(s.subject)
        if r is None or s.subject not in result.population_predictions:
            continue
        keep = ~s.blq
        obs.append(s.conc[keep])
        pred.append(result.population_predictions[s.subject][keep])
        ipred.append(r.predicted[keep])
        time.append(s.time[keep])
        cwres.append(r.weighted_residuals[keep])
    def cat(xs):
        return np.concatenate(xs) if xs else np.empty(0)

    obs, pred, ipred, time, cwres = map(cat, (obs, pred, ipred, time, cwres))
    top = float(np.nanmax(np.r_[obs, pred, ipred, 1e-9])) * 1.05
    for ax, x, label in ((axes[0, 0], pred, "population prediction"),
                         (axes[0, 1], ipred, "individual prediction")):
        ax.plot(conv(x, "concentration"), conv(obs, "concentration"), "o", ms=3, color="black",
                mfc="white")
        ax.plot([0, conv(top, "concentration")], [0, conv(top, "concentration")], "--",
                color="0.4", lw=1)
        ax.set_xlabel(f"{label} [{conv.unit('concentration')}]")
        ax.set_ylabel(f"observed [{conv.unit('concentration')}]")
        ax.set_title(f"observed vs {label}", fontsize=9)
    ax = axes[1, 0]
    ok = np.isfinite(cwres)
    ax.plot(conv(time[ok], "time"), cwres[ok], "o", ms=3, color="black", mfc="white")
    ax.axhline(0, color="0.4", lw=1)
    for y in (-2, 2):
        ax.axhline(y, color="0.6", lw=0.8, ls=":")
    ax.set_xlabel(glossary.axis("time", conv.unit("time")))
    ax.set_ylabel("individual weighted residual")
    ax.set_title("weighted residuals (individual fits) vs time", fontsize=9)
    ax = axes[1, 1]
    w = np.array([fits[s.subject].weight or np.nan for s in subjects if s.subject in fits])
    cl = np.array([fits[s.subject].clearance for s in subjects if s.subject in fits])
    v = np.array([fits[s.subject].volume for s in subjects if s.subject in fits])
    if np.isfinite(w).any():
        ax.plot(w, conv(cl, "clearance"), "o", ms=3.5, color="black", label="clearance")
        ax2 = ax.twinx()
        ax2.plot(w, conv(v, "volume"), "s", ms=3.5, color="0.5", mfc="white", label="volume")
        ax2.set_ylabel(f"volume [{conv.unit('volume')}] (squares)")
        ax.set_xlabel("body weight [kg]")
        ax.set_ylabel(f"clearance [{conv.unit('clearance')}] (dots)")
        ax.set_title("individual estimates vs body weight", fontsize=9)
    else:
        ax.text(0.5, 0.5, "no body weights in the subjects table", ha="center",
                transform=ax.transAxes)
        ax.set_axis_off()
    for a in axes.flat:
        a.grid(True, color="0.88", linewidth=0.6)
    return fig


def vpc_figure(subjects, simulated: np.ndarray, conv: UnitConverter | None = None,
               bins: int = 6) -> Figure:
    """Visual predictive check: observed 5/50/95th percentiles per time bin against the
    90 % range of the same percentiles over simulated replicates of the design."""
    conv = conv or UnitConverter()
    time = np.concatenate([s.time for s in subjects])
    obs = np.concatenate([np.where(s.blq, np.nan, s.conc) for s in subjects])
    edges = np.unique(np.quantile(time, np.linspace(0, 1, bins + 1)))
    which = np.clip(np.searchsorted(edges, time, side="right") - 1, 0, len(edges) - 2)
    mids, obs_p, sim_lo, sim_hi = [], [], [], []
    qs = (5, 50, 95)
    for b in range(len(edges) - 1):
        m = which == b
        if m.sum() < 3:
            continue
        mids.append(float(np.median(time[m])))
        obs_p.append(np.nanpercentile(obs[m], qs))
        per_rep = np.nanpercentile(simulated[:, m], qs, axis=1)        # (3, replicates)
        sim_lo.append(np.percentile(per_rep, 5, axis=1))
        sim_hi.append(np.percentile(per_rep, 95, axis=1))
    fig, ax = new_figure(7.5, 4.6)
    if mids:
        mids_c = conv(np.array(mids), "time")
        obs_p, sim_lo, sim_hi = (np.array(a) for a in (obs_p, sim_lo, sim_hi))
        shades = {5: "0.85", 50: "0.7", 95: "0.85"}
        for j, q in enumerate(qs):
            ax.fill_between(mids_c, conv(sim_lo[:, j], "concentration"),
                            conv(sim_hi[:, j], "concentration"), color=shades[q], lw=0,
                            label=f"simulated {q}th percentile (90 % range)")
            ax.plot(mids_c, conv(obs_p[:, j], "concentration"), "-o" if q == 50 else "--",
                    color="black", ms=3, lw=1.2 if q == 50 else 0.9,
                    label=f"observed {q}th percentile")
    ax.plot(conv(time, "time"), conv(obs, "concentration"), ".", color="0.3", ms=3,
            label="observed levels")
    ax.set_xlabel(glossary.axis("time", conv.unit("time")))
    ax.set_ylabel(glossary.axis("concentration", conv.unit("concentration")))
    ax.set_title(f"visual predictive check ({simulated.shape[0]} simulated replicates of the "
                 "design)", fontsize=9)
    ax.legend(fontsize=6.5, frameon=False, ncol=2)
    ax.set_ylim(bottom=0)
    return fig


def batch_figure(summary, conv: UnitConverter | None = None) -> Figure:
    """Distributions of plateau and time to 90 % across the batch (and, for variability
    runs, of the fraction of virtual subjects inside the window)."""
    conv = conv or UnitConverter()
    panels = 3 if summary.fraction_in_window else 2
    fig = Figure(figsize=(3.6 * panels, 3.6), layout="constrained")
    fig.text(0.01, 0.005, CAUTION_SHORT, fontsize=6.5, color="0.25")
    fig.get_layout_engine().set(rect=(0, 0.05, 1, 0.95))
    axes = fig.subplots(1, panels)
    data = [(np.asarray(summary.plateau, float), "concentration",
             glossary.axis("plateau", conv.unit("concentration"))),
            (np.asarray(summary.time_to_90, float), "time",
             glossary.axis("time_to_90_percent", conv.unit("time")))]
    for ax, (values, kind, label) in zip(axes, data, strict=False):
        values = values[np.isfinite(values)]
        ax.hist(conv(values, kind), bins=40, color="0.6", edgecolor="black", linewidth=0.3)
        ax.set_xlabel(label)
        ax.set_ylabel("scenarios")
    if summary.fraction_in_window:
        ax = axes[2]
        f = np.asarray(summary.fraction_in_window, float)
        ax.plot(np.arange(1, f.size + 1), 100 * f, "o", ms=3, color="black")
        ax.set_ylim(-2, 102)
        ax.set_xlabel("scenario (row)")
        ax.set_ylabel("virtual subjects in the window\nat steady state [%]")
    for ax in np.atleast_1d(axes):
        ax.grid(True, color="0.88", linewidth=0.6)
    return fig


def sampling_figure(result, conv: UnitConverter | None = None) -> Figure:
    """Why those times: the typical course with the designed times marked (top) and
    the relative sensitivity of the level to CL and V over time (bottom)."""
    conv = conv or UnitConverter()
    p = result.problem
    fig = Figure(figsize=(7.5, 6.0), layout="constrained")
    ax, ax2 = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 2]})
    fig.text(0.01, 0.005, CAUTION_SHORT, fontsize=6.5, color="0.25", ha="left", va="bottom")
    fig.get_layout_engine().set(rect=(0, 0.035, 1, 0.965))
    start, amount, duration = expand_events(p.doses)
    if p.initial_concentration > 0:
        start, amount, duration = (np.append(start, 0.0),
                                   np.append(amount, p.initial_concentration),
                                   np.append(duration, model.INITIAL_LEVEL))
    hi = p.window[1]
    t = np.unique(np.concatenate([np.linspace(0.0, hi * 1.05, 1500), start, start +
                                  np.maximum(duration, 0.0)]))
    t = t[t <= hi * 1.05]
    f, grad = model.concentration_and_gradient(t, start, amount, duration, p.clearance,
                                               p.volume)
    tt = conv(t, "time")
    ax.plot(tt, conv(f, "concentration"), color="black", lw=1.4, label="typical course")
    for a, b in result.allowed:
        ax.axvspan(conv(a, "time"), conv(b, "time"), color="0.93", zorder=0)
    marks = ["o", "s", "^", "D", "v"]
    for i, d in enumerate(result.designs[:5]):
        times = np.concatenate([np.asarray(x, float) for x in d.times])
        ft = model.concentration(times, start, amount, duration, p.clearance, p.volume)
        ax.plot(conv(times, "time"), conv(ft, "concentration"), ls="none", marker=marks[i],
                ms=7 if i == 0 else 5, mfc="black" if i == 0 else "white", mec="black",
                label=d.label)
        for x in times:
            ax2.axvline(conv(x, "time"), color="0.6" if i else "black", lw=0.8,
                        ls="-" if i == 0 else ":")
    ax.set_ylabel(glossary.axis("concentration", conv.unit("concentration")))
    ax.set_title(f"{p.name}: sampling times (allowed periods shaded)", fontsize=10)
    ax.legend(fontsize=8, loc="best")
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = np.where(f > 0, grad / f, np.nan)
    ax2.plot(tt, rel[0], color="black", lw=1.3, label="d ln C / d ln CL")
    ax2.plot(tt, rel[1], color="0.45", lw=1.3, ls="--", label="d ln C / d ln V")
    ax2.axhline(0.0, color="0.7", lw=0.6)
    ax2.set_ylabel("relative sensitivity")
    ax2.set_xlabel(glossary.axis("time", conv.unit("time")))
    ax2.legend(fontsize=8, loc="best")
    ax2.grid(True, color="0.88", linewidth=0.6)
    ax.grid(True, color="0.88", linewidth=0.6)
    return fig


def attainment_figure(result, conv: UnitConverter | None = None) -> Figure | None:
    """Share of patients meeting every target against the dose (or rate): one panel per
    interval, one line per band."""
    groups: dict[object, list[int]] = {}
    for j, r in enumerate(result.regimens):
        groups.setdefault("continuous" if r.rate is not None else r.interval, []).append(j)
    fig = Figure(figsize=(3.6 * len(groups) + 1.5, 4.4), layout="constrained")
    axes = fig.subplots(1, len(groups), squeeze=False, sharey=True)
    fig.text(0.01, 0.005, CAUTION_SHORT, fontsize=6.5, color="0.25", ha="left", va="bottom")
    fig.get_layout_engine().set(rect=(0, 0.035, 1, 0.965))
    styles = ["-", "--", ":", "-.", (0, (3, 1, 1, 1)), (0, (5, 2))]
    greys = ["black", "0.3", "0.45", "0.6", "0.7", "0.2"]
    for ax, (key, idx) in zip(axes[0], groups.items(), strict=True):
        x = [result.regimens[j].rate if key == "continuous" else result.regimens[j].dose
             for j in idx]
        order = np.argsort(x)
        for b, band in enumerate(result.band_names):
            y = 100 * result.fraction[b, idx, -1]
            ax.plot(np.asarray(x)[order], y[order], marker="o", ms=3, ls=styles[b % 6],
                    color=greys[b % 6], lw=1.6 if b == 0 else 1.1, label=band)
        ax.axhline(100 * result.level, color="0.5", lw=0.8, ls=(0, (1, 2)))
        ax.set_title("continuous infusion" if key == "continuous" else f"every {key:g} h",
                     fontsize=9)
        ax.set_xlabel("rate [mg/h]" if key == "continuous" else "dose [mg]")
        ax.set_ylim(0, 100)
        ax.grid(True, color="0.88", linewidth=0.6)
    axes[0][0].set_ylabel("patients meeting every target [%]")
    axes[0][-1].legend(fontsize=7, frameon=False, loc="best")
    fig.suptitle("target attainment of virtual patients (a model, not a guarantee)",
                 fontsize=9)
    return fig
