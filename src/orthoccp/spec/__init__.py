"""Spec files: the TOML description of a panel, a model and the estimation options.

A spec file has the tables ``[data]``, ``[model]``, ``[utility.<choice>]`` (one per choice
with parameters), and the optional ``[first_stage]`` and ``[inference]``::

    [data]
    unit = "bike"
    period = "week"
    choice = "action"
    states = ["wear", "x0", "x1"]
    path = "panel.csv"            # optional, relative to the spec file
    missing = "error"             # optional: "drop" drops rows with missing values

    [model]
    kind = "renewal"
    anchor = "swap"
    discount = 0.95
    persistent = ["x0"]           # optional

    [utility.keep]
    wear_cost = "wear_scaled"     # parameter = column ("1" is a constant)

    [utility.swap]
    swap_cost = "1"

    [first_stage]                 # optional
    learner = "lightgbm"
    folds = 5
    seed = 0

    [inference]                   # optional
    cov = "clustered"

:func:`read_spec` parses and validates a file into a frozen :class:`Spec`; every error is a
:class:`SpecError` (an :class:`~orthoccp.InputError`) whose message names the file, the key,
the expected type and the offending value. :func:`write_spec` writes a spec (or any nested
mapping of TOML values) back to disk. :func:`read_data` and :func:`write_data` handle the
panel files (CSV, or Parquet through pyarrow); :func:`read_panel` reads only the columns a
:class:`~orthoccp.Panel` uses.

Layout: ``_check`` (vocabularies, :class:`SpecError`, the value checker), ``_records`` (the
frozen dataclasses), ``_read`` (key lists, :func:`parse_spec`, :func:`read_spec`,
:func:`write_spec`), ``_toml`` (:func:`dumps_toml`) and ``_data`` (panel files).
"""

from __future__ import annotations

from ._check import SpecError
from ._data import data_format, data_stem, read_data, read_panel, write_data
from ._read import parse_spec, read_spec, write_spec
from ._records import DataSpec, EstimatorSpec, FirstStageSpec, InferenceSpec, ModelSpec, Spec
from ._toml import dumps_toml

__all__ = [
    "DataSpec",
    "EstimatorSpec",
    "FirstStageSpec",
    "InferenceSpec",
    "ModelSpec",
    "Spec",
    "SpecError",
    "data_format",
    "data_stem",
    "dumps_toml",
    "parse_spec",
    "read_data",
    "read_panel",
    "read_spec",
    "write_data",
    "write_spec",
]
