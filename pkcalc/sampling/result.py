"""The result of a sampling-time design: schedules, expected and simulated precision."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from ..core import SamplingProblem

__all__ = ["DesignEvaluation", "SamplingResult", "SimulationSummary"]


@dataclass
class SimulationSummary:
    """Re-estimates from simulated replicates of one design.

    ``parameters[name]`` holds ``true``, ``mean``, ``bias_percent``,
    ``rmse_percent``, ``empirical_rse_percent`` (100 x SD of the log estimates),
    ``coverage_percent`` (of the 95 % intervals, None when the re-estimate gave
    none) and ``intervals`` (replicates with an interval).
    """

    replicates: int
    failed: int
    method: str
    seed: int
    parameters: dict[str, dict[str, float | int | None]] = field(default_factory=dict)

    def no_coverage_reason(self) -> str | None:
        """Why the interval coverage is missing ("" -> None when it is there)."""
        if all(p.get("coverage_percent") is not None for p in self.parameters.values()):
            return None
        if self.failed == self.replicates:
            return "every re-estimate failed"
        return ("no re-estimate gave a 95 % interval: their standard errors could not be "
                "computed (for example as many levels as estimated parameters)")


@dataclass
class DesignEvaluation:
    """One schedule (per group) and what it is expected to give.

    Attributes
    ----------
    label : str
        ``"optimal"``, ``"compare"`` (``"compare 1"``, ``"compare 2"``... with several
        schedules under ``compare``) or ``"group times"`` (the groups' own times).
    times : list of list of float, h
        Per group, sorted.
    expected_rse_percent : dict
        ``clearance`` and ``volume`` (and, for population designs, the variance
        parameters: RSE of each variance), None when not estimable.
    log_det : float
        ``ln det M`` of the whole design.
    efficiency : float or None
        D-efficiency against the optimum, ``(det M / det M_opt)^(1/p)``.
    simulation : SimulationSummary or None
    """

    label: str
    times: list[list[float]]
    expected_rse_percent: dict[str, float | None]
    log_det: float
    efficiency: float | None = None
    simulation: SimulationSummary | None = None


@dataclass
class SamplingResult:
    """A sampling design of one scenario.

    Attributes
    ----------
    problem : SamplingProblem
    designs : list of DesignEvaluation
        The optimum first, then the user's schedules.
    allowed : list of (float, float), h
        The allowed sampling periods after every constraint.
    parameters : list of str
        The parameters the information is about.
    seconds : float
    notes, warnings : list of str
    """

    problem: SamplingProblem
    designs: list[DesignEvaluation]
    allowed: list[tuple[float, float]]
    parameters: list[str]
    seconds: float = 0.0
    notes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)

    @property
    def optimal(self) -> DesignEvaluation:
        return self.designs[0]

    def clock_text(self, t: float) -> str | None:
        """A time as a clock time (scenarios on the clock), else None."""
        if not self.problem.clock_origin:
            return None
        from datetime import datetime, timedelta

        origin = datetime.fromisoformat(self.problem.clock_origin)
        minutes = round(float(t) * 60.0)  # to the nearest minute
        return (origin + timedelta(minutes=minutes)).isoformat(timespec="minutes")

    def to_frame(self):
        """One row per design, group and level: the time (relative and clock), and the
        design's expected (and simulated) relative SEs of CL and V."""
        import pandas as pd

        rows = []
        for d in self.designs:
            for g, times in zip(self.problem.groups, d.times, strict=True):
                for j, t in enumerate(times):
                    row = {"design": d.label, "group": g.name, "subjects": g.subjects,
                           "sample": j + 1, "time [h]": t, "clock_time": self.clock_text(t),
                           "expected_rse_clearance [%]": d.expected_rse_percent["clearance"],
                           "expected_rse_volume [%]": d.expected_rse_percent["volume"],
                           "efficiency": d.efficiency}
                    if d.simulation is not None:
                        for k in ("clearance", "volume"):
                            row[f"simulated_rse_{k} [%]"] = \
                                d.simulation.parameters[k]["empirical_rse_percent"]
                    rows.append(row)
        frame = pd.DataFrame(rows)
        if not self.problem.clock_origin:
            frame = frame.drop(columns="clock_time")
        return frame

    def summary(self, caution: bool = True) -> str:
        """The designs in words (no caution)."""
        from .._format import format_table, short, with_caution

        p = self.problem
        groups = ", ".join(f"{g.name}: {g.subjects} x {g.levels} levels" for g in p.groups)
        lines = [f"Sampling design '{p.name}' ({p.design}, {p.criterion}-optimal; {groups})",
                 "allowed: " + "; ".join(f"{a:g}-{b:g} h" for a, b in self.allowed)]
        for d in self.designs:
            when = " | ".join(", ".join(self._when(t) for t in times) for times in d.times)
            eff = "" if d.efficiency is None else f", efficiency {d.efficiency:.2f}"
            lines.append(f"{d.label}: {when}{eff}")
        head = ["design", "expected RSE CL %", "expected RSE V %"]
        sim = any(d.simulation is not None for d in self.designs)
        if sim:
            head += ["simulated RSE CL %", "simulated RSE V %", "bias CL %", "bias V %",
                     "95% coverage CL %", "95% coverage V %"]
        rows = []
        for d in self.designs:
            row = [d.label, d.expected_rse_percent["clearance"], d.expected_rse_percent["volume"]]
            if sim:
                s = d.simulation.parameters if d.simulation else {}
                row += [s.get(k, {}).get(m) for m in ("empirical_rse_percent", "bias_percent",
                                                      "coverage_percent")
                        for k in ("clearance", "volume")]
            rows.append([short(x) if isinstance(x, float) else ("-" if x is None else x)
                         for x in row])
        lines.append(format_table(head, rows))
        for d in self.designs:
            if d.simulation is not None:
                s = d.simulation
                lines.append(f"{d.label}: {s.replicates} simulated replicates re-estimated "
                             f"({s.method}, seed {s.seed}), {s.failed} failed")
                why = s.no_coverage_reason()
                if why:
                    lines.append(f"  95% coverage '-': {why}")
        lines += self.notes
        return with_caution("\n".join(lines), caution)

    def _when(self, t: float) -> str:
        clock = self.clock_text(t)
        return f"{t:.4g} h" + (f" ({clock})" if clock else "")

    def _repr_html_(self) -> str:
        from .._format import result_html

        return result_html(self.summary(caution=False), self.to_frame())


def efficiency(log_det: float, log_det_opt: float, p: int) -> float | None:
    if not (np.isfinite(log_det) and np.isfinite(log_det_opt)):
        return None
    return float(np.exp((log_det - log_det_opt) / p))
