"""CDISC SDTM study data -> a study (PC, EX or EC, DM, VS, LB as ``.xpt``, Dataset-JSON
or CSV).  See :mod:`pkcalc.schema.sdtm.load` for the choices and the clock, and
docs/formats.md (rules X1-X9) for the contract."""

from .datasets import Dataset, read_dataset
from .load import TIME_BASES, export_tables, load_sdtm
from .log import ImportLog
from .terms import IV_ROUTES

__all__ = ["IV_ROUTES", "TIME_BASES", "Dataset", "ImportLog", "export_tables", "load_sdtm",
           "read_dataset"]
