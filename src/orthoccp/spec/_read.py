"""Reading and writing spec files: the key lists of every table and the checked parser."""

from __future__ import annotations

import os
import sys
from collections.abc import Callable, Mapping
from pathlib import Path
from types import MappingProxyType
from typing import Any

from .._outputs import writing
from ..covariance import covariance_names
from ._check import (
    INITIAL_CCPS,
    KINDS,
    METHODS,
    MISSING,
    MOMENTS,
    TRANSITIONS,
    VALUES,
    SpecError,
    _Checker,
    _show,
)
from ._records import DataSpec, EstimatorSpec, FirstStageSpec, InferenceSpec, ModelSpec, Spec
from ._toml import _toml_key, dumps_toml

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib


# --------------------------------------------------------------------------- parsing
_TOP_KEYS = ("data", "model", "utility", "first_stage", "inference", "estimator")
_DATA_KEYS = ("unit", "period", "choice", "states", "path", "missing")
_MODEL_KEYS = ("kind", "anchor", "discount", "persistent")
_FIRST_STAGE_KEYS = ("learner", "regressor", "folds", "seed", "splits", "scheme", "clip",
                     "model_ccp_steps")
_INFERENCE_KEYS = ("cov", "small_sample", "debias", "moments", "correction_weights")
_ESTIMATOR_KEYS = (
    "method", "values", "transitions", "smoothing", "reset_choices", "n_states", "steps",
    "max_iterations", "tol", "n_paths", "horizon", "initial_ccp", "sieve_degree",
)
# Options of the orthogonal estimator that the discrete-state estimators do not use.
_ORTHOGONAL_ONLY = (
    "first_stage.learner", "first_stage.regressor", "first_stage.folds", "first_stage.splits",
    "first_stage.scheme", "first_stage.clip", "first_stage.model_ccp_steps", "inference.debias",
    "inference.moments", "inference.correction_weights", "model.persistent",
)


def parse_spec(
    document: Mapping[str, Any],
    *,
    base_dir: str | os.PathLike[str] | None = None,
    source: str | os.PathLike[str] | None = None,
) -> Spec:
    """Validate a parsed spec document (nested mappings, as from :mod:`tomllib`).

    Parameters
    ----------
    document : Mapping
        The spec's tables.
    base_dir : path-like, optional
        Folder that a relative ``data.path`` is resolved against; the working directory
        when omitted.
    source : path-like, optional
        File name used in error messages and kept as :attr:`Spec.source`.

    Returns
    -------
    Spec

    Raises
    ------
    SpecError
        For an unknown or missing key, a wrong type or an out-of-range value; the message
        names the key, the expected type and the value, and lists valid keys or values.
    """
    src = Path(source) if source is not None else None
    chk = _Checker(src)
    doc = chk.table("spec", document)
    chk.keys("", doc, _TOP_KEYS)
    for name in ("data", "model", "utility"):
        if name not in doc:
            raise chk.fail(name, f"missing required table [{name}].")

    # [data]
    data = chk.table("data", doc["data"])
    chk.keys("data", data, _DATA_KEYS)
    unit = chk.string("data.unit", chk.required("data", data, "unit", "the unit column"))
    period = chk.string("data.period", chk.required("data", data, "period", "the period column"))
    choice = chk.string("data.choice", chk.required("data", data, "choice", "the choice column"))
    states = chk.strings(
        "data.states", chk.required("data", data, "states", "the state columns"), allow_empty=False
    )
    roles = {unit: "data.unit", period: "data.period", choice: "data.choice"}
    if len(roles) < 3:
        raise chk.fail(
            "data", "data.unit, data.period and data.choice must name three different columns."
        )
    for s in states:
        if s in roles:
            raise chk.fail("data.states", f"data.states lists {s!r}, which is already {roles[s]}.")
    path: Path | None = None
    if "path" in data:
        raw_path = Path(chk.string("data.path", data["path"])).expanduser()
        if not raw_path.is_absolute():
            base = Path(base_dir) if base_dir is not None else Path.cwd()
            raw_path = base / raw_path
        path = raw_path
    missing = chk.choice("data.missing", data.get("missing", "error"), MISSING)

    estimator = _parse_estimator(chk, doc.get("estimator", {}))

    # [model]
    model = chk.table("model", doc["model"])
    chk.keys("model", model, _MODEL_KEYS)
    kind: str | None = None
    anchor: str | int | None = None
    if not estimator.discrete or "kind" in model:
        kind = chk.choice(
            "model.kind", chk.required("model", model, "kind", "'renewal' or 'terminal'"), KINDS
        )
    if not estimator.discrete or "anchor" in model:
        anchor = chk.label(
            "model.anchor", chk.required("model", model, "anchor", "the anchor choice")
        )
    discount = chk.option(
        "model.discount", "discount",
        chk.required("model", model, "discount", "a number in [0, 1)"),
    )
    persistent = chk.strings("model.persistent", model.get("persistent", []), allow_empty=True)
    for s in persistent:
        if s not in states:
            raise chk.fail(
                "model.persistent",
                f"model.persistent lists {s!r}, which is not one of data.states.",
            )

    # [utility.<choice>]
    utility_doc = chk.table("utility", doc["utility"])
    if not utility_doc:
        raise chk.fail("utility", "[utility] is empty; add a table [utility.<choice>] per choice.")
    utility: dict[str, Mapping[str, str]] = {}
    for label, params in utility_doc.items():
        key = f"utility.{_toml_key(label)}"
        if not isinstance(params, Mapping):
            raise chk.fail(
                key,
                f"{key} must be a table of parameter = column (\"1\" for a constant), got "
                f"{_show(params)}; write it as [{key}].",
            )
        table: dict[str, str] = {}
        for name, column in params.items():
            pkey = f"{key}.{_toml_key(name)}"
            if isinstance(column, Mapping):
                raise chk.fail(
                    pkey,
                    f"{pkey} must be a column name (string), got a table; nest one level only.",
                )
            table[name] = chk.string(pkey, column)
        utility[str(label)] = MappingProxyType(table)
    if not any(utility.values()):
        raise chk.fail("utility", "the [utility.<choice>] tables declare no parameters.")

    # [first_stage]
    fs_doc = chk.table("first_stage", doc.get("first_stage", {}))
    chk.keys("first_stage", fs_doc, _FIRST_STAGE_KEYS)
    def fs(name: str, check: Callable[[str, Any], Any] | None = None) -> Any:
        value = fs_doc.get(name)
        if value is None:
            return None
        key = f"first_stage.{name}"
        return chk.option(key, name, value) if check is None else check(key, value)

    first_stage = FirstStageSpec(
        learner=fs("learner"),
        regressor=fs("regressor"),
        folds=fs("folds"),
        seed=fs("seed"),
        splits=fs("splits"),
        scheme=fs("scheme"),
        clip=fs("clip"),
        model_ccp_steps=fs("model_ccp_steps", lambda k, v: chk.integer(k, v, minimum=0)),
    )

    # [inference]
    inf_doc = chk.table("inference", doc.get("inference", {}))
    chk.keys("inference", inf_doc, _INFERENCE_KEYS)

    def inf(name: str, check: Callable[[str, Any], Any]) -> Any:
        value = inf_doc.get(name)
        return None if value is None else check(f"inference.{name}", value)

    inference = InferenceSpec(
        cov=inf("cov", lambda k, v: chk.choice(k, v, covariance_names())),
        small_sample=inf("small_sample", lambda k, v: chk.option(k, "small_sample", v)),
        debias=inf("debias", lambda k, v: chk.option(k, "debias", v)),
        moments=inf("moments", lambda k, v: chk.choice(k, v, MOMENTS)),
        correction_weights=inf("correction_weights",
                               lambda k, v: chk.option(k, "correction_weights", v)),
    )

    if estimator.discrete:
        tables = {"first_stage": fs_doc, "inference": inf_doc, "model": model}
        for dotted in _ORTHOGONAL_ONLY:
            section, key = dotted.split(".")
            if key in tables[section]:
                raise chk.fail(
                    dotted,
                    f"{dotted} does not apply with estimator.method = {estimator.method!r} (the "
                    f"discrete-state estimators fit no learner and use no anchor); remove it, "
                    f"or set estimator.method = \"orthogonal\".",
                )
    return Spec(
        data=DataSpec(
            unit=unit, period=period, choice=choice, states=states, path=path, missing=missing
        ),
        model=ModelSpec(kind=kind, anchor=anchor, discount=discount, persistent=persistent),
        utility=MappingProxyType(utility),
        first_stage=first_stage,
        inference=inference,
        source=src,
        estimator=estimator,
    )


def _parse_estimator(chk: _Checker, value: Any) -> EstimatorSpec:
    est_doc = chk.table("estimator", value)
    chk.keys("estimator", est_doc, _ESTIMATOR_KEYS)
    method = chk.choice("estimator.method", est_doc.get("method", "orthogonal"), METHODS)
    if method == "orthogonal":
        extra = [k for k in est_doc if k != "method"]
        if extra:
            raise chk.fail(
                f"estimator.{extra[0]}",
                f"estimator.{extra[0]} applies to the discrete-state estimators only; set "
                f"estimator.method = \"npl\" or \"pml\", or remove it.",
            )
        return EstimatorSpec()

    def opt(name: str, check: Callable[[str, Any], Any]) -> Any:
        v = est_doc.get(name)
        return None if v is None else check(f"estimator.{name}", v)

    def positive(k: str, v: Any) -> float:
        x = chk.number(k, v)
        if not x > 0:
            raise chk.fail(k, f"{k} must be a number > 0, got {v!r}.")
        return x

    def non_negative(k: str, v: Any) -> float:
        x = chk.number(k, v)
        if not x >= 0:
            raise chk.fail(k, f"{k} must be a number >= 0, got {v!r}.")
        return x

    return EstimatorSpec(
        method=method,
        values=opt("values", lambda k, v: chk.choice(k, v, VALUES)),
        transitions=opt("transitions", lambda k, v: chk.choice(k, v, TRANSITIONS)),
        smoothing=opt("smoothing", non_negative),
        reset_choices=opt("reset_choices", lambda k, v: chk.strings(k, v, allow_empty=True)),
        n_states=opt("n_states", lambda k, v: chk.integer(k, v, minimum=1)),
        steps=opt("steps", lambda k, v: chk.integer(k, v, minimum=1)),
        max_iterations=opt("max_iterations", lambda k, v: chk.integer(k, v, minimum=1)),
        tol=opt("tol", positive),
        n_paths=opt("n_paths", lambda k, v: chk.integer(k, v, minimum=1)),
        horizon=opt("horizon", lambda k, v: chk.integer(k, v, minimum=1)),
        initial_ccp=opt("initial_ccp", lambda k, v: chk.choice(k, v, INITIAL_CCPS)),
        sieve_degree=opt("sieve_degree", lambda k, v: chk.integer(k, v, minimum=1)),
    )


def read_spec(path: str | os.PathLike[str]) -> Spec:
    """Read and validate a TOML spec file.

    Parameters
    ----------
    path : path-like
        The spec file (UTF-8; a leading byte-order mark is ignored). A relative
        ``data.path`` inside it is resolved against its folder.

    Returns
    -------
    Spec

    Raises
    ------
    FileNotFoundError
        When the file does not exist.
    SpecError
        When the file is not valid TOML or fails validation (see :func:`parse_spec`).
    """
    p = Path(path)
    if not p.is_file():
        if p.is_dir():
            raise SpecError(f"spec file {str(p)!r} is a folder, not a TOML file.", key=None)
        raise FileNotFoundError(2, "spec file not found", str(p))
    try:
        raw = p.read_bytes()
        # A UTF-8 byte-order mark (written by some Windows editors) is not TOML: drop it.
        text = raw.removeprefix(b"\xef\xbb\xbf").decode("utf-8")
        document = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SpecError(f"{p}: not valid TOML: {exc}.") from exc
    except UnicodeDecodeError as exc:
        raise SpecError(f"{p}: not valid TOML: the file is not UTF-8 text ({exc.reason}).") from exc
    return parse_spec(document, base_dir=p.parent, source=p)


def write_spec(
    path: str | os.PathLike[str],
    spec: Mapping[str, Any] | Spec,
    *,
    header: str | None = None,
) -> Path:
    """Write a spec file.

    Parameters
    ----------
    path : path-like
        Destination (``.toml``); its folder is created when missing.
    spec : Mapping or Spec
        Nested mapping with the tables of a spec file, or a :class:`Spec` (its data path is
        written relative to the destination's folder).
    header : str, optional
        Comment written at the top of the file.

    Returns
    -------
    pathlib.Path
        The written file.
    """
    p = Path(path)
    document = spec.to_dict(relative_to=p.parent) if isinstance(spec, Spec) else spec
    text = dumps_toml(document, header=header)
    with writing(p):
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(text, encoding="utf-8")
    return p
