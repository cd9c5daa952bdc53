"""Scenario batches: one vectorised kernel, chunked streaming, variability, engines.

A batch table has one row per scenario and unit-bearing headers (docs/formats.md):
any two of ``clearance``, ``volume``, ``half_life``, ``elimination_rate``,
``time_constant``; ``rate`` (or ``dose``); optional ``duration``, ``interval``,
``loading_dose``, ``target``, ``window_low``, ``window_high``, ``weight``.

- no ``interval``: a constant-rate infusion from time 0 (for ``duration`` when
  given, otherwise without end); the plateau is ``rate/CL``;
- ``interval``: doses of ``rate x duration`` (or ``dose``) infused over
  ``duration`` (0 or absent: boluses) every ``interval``, without end; the
  steady state comes from :func:`pkcalc.model.steady_state_intermittent`;
- ``loading_dose``: a bolus at time 0, added to the concentrations at ``--at``
  times.

Units are parsed once per column from the header; the kernel is pure numpy
over whole columns.  A row with a problem gets its reason in the ``error``
column and empty results; the other rows are computed.  Input columns are
carried through unchanged.
"""

from .columns import (
    DEFAULT_CHUNK_ROWS,
    FRACTIONS,
    INPUT_KINDS,
    MAX_CHUNK_ROWS,
    MAX_POPULATION,
    PARAMETERS,
    POPULATION_BLOCK,
    TARGET_BAND,
    BatchOptions,
    BatchSpec,
    BatchSummary,
    parse_columns,
)
from .io import grid_frame, scenario_rows, write_stream
from .kernel import compute
from .run import run_batch

__all__ = [
    "DEFAULT_CHUNK_ROWS",
    "FRACTIONS",
    "INPUT_KINDS",
    "MAX_CHUNK_ROWS",
    "MAX_POPULATION",
    "PARAMETERS",
    "POPULATION_BLOCK",
    "TARGET_BAND",
    "BatchOptions",
    "BatchSpec",
    "BatchSummary",
    "compute",
    "grid_frame",
    "parse_columns",
    "run_batch",
    "scenario_rows",
    "write_stream",
]
