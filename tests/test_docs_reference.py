"""The reference pages in ``docs/`` say what the code does, so they cannot drift.

Each check reads a page and compares it with the code or the benchmark files it describes:

* the spec-key tables of ``docs/cli.md`` against the key lists of :mod:`orthoccp.spec`, the
  defaults of :func:`orthoccp.estimate` and :func:`orthoccp.estimate_discrete`, and the spec
  reader (every example line must parse);
* the command tables of ``docs/cli.md`` against :func:`orthoccp.cli.build_parser`;
* the learner table of ``docs/learners.md`` against the learner registry;
* the API page against ``orthoccp.__all__``, and the toctree against the pages on disk;
* every ``orthoccp.<name>`` and ``--option`` mentioned on any page against the package;
* the numbers of ``docs/validation.md`` against ``benchmarks/results/*.json``, rounded as
  printed (the reference is the JSON each table names).
"""

from __future__ import annotations

import argparse
import importlib
import inspect
import json
import re
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import orthoccp
from orthoccp.spec import _read as spec_module
from orthoccp.cli import build_parser
from orthoccp.learners import _REGISTRY

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10 only
    import tomli as tomllib

ROOT = Path(__file__).resolve().parent.parent
DOCS = ROOT / "docs"
RESULTS = ROOT / "benchmarks" / "results"


def _page(name: str) -> str:
    return (DOCS / name).read_text(encoding="utf-8")


def _section(text: str, heading: str) -> str:
    """The text under a Markdown heading (exact heading line), up to the next heading of the
    same or a higher level."""
    lines = text.splitlines()
    level = len(heading) - len(heading.lstrip("#"))
    try:
        start = next(i for i, line in enumerate(lines) if line.strip() == heading)
    except StopIteration:
        raise AssertionError(f"heading {heading!r} not found") from None
    out = []
    for line in lines[start + 1:]:
        m = re.match(r"^(#+)\s", line)
        if m and len(m.group(1)) <= level:
            break
        out.append(line)
    return "\n".join(out)


def _tables(text: str) -> list[list[dict[str, str]]]:
    """The Markdown tables of ``text``: one list of {header: cell} per table."""
    tables: list[list[dict[str, str]]] = []
    block: list[str] = []
    for line in [*text.splitlines(), ""]:
        if line.startswith("|"):
            block.append(line)
            continue
        if len(block) >= 2:
            split = [[c.strip() for c in re.split(r"(?<!\\)\|", row.strip())[1:-1]] for row in block]
            header: list[str] = []
            rows = split[2:]
            for h in split[0]:  # repeated headers ("SD" per parameter) made unique
                n = len([x for x in header if x == h or x.startswith(f"{h} #")])
                header.append(h if n == 0 else f"{h} #{n + 1}")
            tables.append([dict(zip(header, row)) for row in rows])
        block = []
    return tables


def _code(cell: str) -> list[str]:
    return re.findall(r"`([^`]+)`", cell)


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return f'"{value}"'
    if isinstance(value, (tuple, list)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, float):
        return repr(value)
    return str(value)


# --------------------------------------------------------------------------- spec keys
SPEC_TABLES = {
    "data": spec_module._DATA_KEYS,
    "model": spec_module._MODEL_KEYS,
    "first_stage": spec_module._FIRST_STAGE_KEYS,
    "inference": spec_module._INFERENCE_KEYS,
    "estimator": spec_module._ESTIMATOR_KEYS,
}
BASE_SPEC: dict[str, dict[str, Any]] = {
    "data": {"unit": "bike", "period": "week", "choice": "action", "states": ["wear", "x0"]},
    "model": {"kind": "renewal", "anchor": "swap", "discount": 0.95},
    "utility": {"keep": {"wear_cost": "wear_scaled"}, "swap": {"swap_cost": "1"}},
}


def _spec_rows(table: str) -> dict[str, dict[str, str]]:
    heading = "### [utility.\\<choice\\>]" if table == "utility" else f"### [{table}]"
    (rows,) = _tables(_section(_page("cli.md"), heading))
    return {(_code(r["key"]) or [r["key"]])[0]: r for r in rows}


def test_every_spec_table_and_key_is_documented() -> None:
    assert set(spec_module._TOP_KEYS) == {*SPEC_TABLES, "utility"}
    for table, keys in SPEC_TABLES.items():
        assert list(_spec_rows(table)) == list(keys), f"[{table}] keys differ from orthoccp.spec._read"
    assert list(_spec_rows("utility")) == ["*parameter name*"]


def test_spec_defaults_are_the_estimators_defaults() -> None:
    # A key left out of [first_stage] / [inference] is not passed on, so the documented
    # default must be the keyword default of orthoccp.estimate (or of estimate_discrete for
    # the [estimator] options).
    est = inspect.signature(orthoccp.estimate).parameters
    disc = inspect.signature(orthoccp.estimate_discrete).parameters
    checked = 0
    for table, source in (("first_stage", est), ("inference", est), ("estimator", disc)):
        for key, row in _spec_rows(table).items():
            if key not in source or source[key].default in (None, inspect.Parameter.empty):
                continue
            default = source[key].default
            assert _toml_value(default) in _code(row["default"]) or (
                isinstance(default, float) and f"{default:g}" in _code(row["default"])
            ), f"[{table}] {key}: documented {row['default']!r}, code default {default!r}"
            checked += 1
    assert checked >= 14
    rows = _spec_rows("data")
    assert _code(rows["missing"]["default"]) == ['"error"']
    assert _code(_spec_rows("estimator")["method"]["default"]) == ['"orthogonal"']
    assert _spec_rows("model")["discount"]["default"] == "required"


def test_every_spec_example_line_is_accepted_by_the_reader() -> None:
    for table in (*SPEC_TABLES, "utility"):
        for key, row in _spec_rows(table).items():
            (line,) = _code(row["example"])
            doc = {k: {kk: (dict(vv) if isinstance(vv, dict) else vv) for kk, vv in v.items()}
                   for k, v in BASE_SPEC.items()}
            parsed = tomllib.loads(line)
            if table == "utility":  # a parameter line of [utility.keep]
                doc["utility"]["keep"] = parsed
                assert spec_module.parse_spec(doc).parameters == (*parsed, "swap_cost")
                continue
            assert list(parsed) == [key], (table, line)
            doc.setdefault(table, {}).update(parsed)
            if table == "estimator" and key != "method":
                doc["estimator"]["method"] = "npl"
            spec_module.parse_spec(doc)


# --------------------------------------------------------------------------- command line
def _subparsers() -> dict[str, argparse.ArgumentParser]:
    parser = build_parser()
    (sub,) = [a for a in parser._actions if isinstance(a, argparse._SubParsersAction)]
    return dict(sub.choices)


def test_every_command_and_option_is_documented_with_its_default() -> None:
    text = _page("cli.md")
    for name, sub in _subparsers().items():
        rows = _tables(_section(text, f"## orthoccp {name}"))[0]  # the options table comes first
        documented = {_code(r["option"])[0].split()[0] if _code(r["option"]) else r["option"]: r
                      for r in rows}
        for action in sub._actions:
            if isinstance(action, argparse._HelpAction) or action.dest == "debug":
                continue
            label = action.option_strings[0] if action.option_strings else action.metavar
            assert label in documented, f"orthoccp {name}: {label} is not on the page"
            default = action.default
            if action.option_strings and isinstance(default, (int, float, str, tuple)) and not (
                isinstance(default, bool)
            ):
                shown = ",".join(default) if isinstance(default, tuple) else str(default)
                assert shown in _code(documented[label]["default"]), (
                    f"orthoccp {name} {label}: documented default "
                    f"{documented[label]['default']!r}, parser default {default!r}"
                )
        assert len(documented) == len(
            [a for a in sub._actions if not isinstance(a, argparse._HelpAction) and a.dest != "debug"]
        ), f"orthoccp {name}: the page lists options the parser does not have"


def test_options_mentioned_anywhere_exist() -> None:
    known = {"--help", "--version", "--debug"}
    for sub in _subparsers().values():
        for action in sub._actions:
            known.update(action.option_strings)
    for path in DOCS.glob("*.md"):
        for span in re.findall(r"`([^`\n]+)`", path.read_text(encoding="utf-8")):
            if not (span.startswith("orthoccp ") or span.startswith("--")):
                continue  # other programs' options (python benchmarks/..., pip, pytest)
            for flag in re.findall(r"(?<![\w-])(--[a-z][a-z-]*)", span):
                assert flag in known, f"docs/{path.name} mentions {flag}, which no command has"


# --------------------------------------------------------------------------- learners
def test_learner_table_matches_the_registry() -> None:
    (rows,) = _tables(_section(_page("learners.md"), "## The built-in learners"))
    names = [_code(r["name"])[0] for r in rows]
    assert names == list(orthoccp.learner_names())
    described = {_code(r["name"])[0]: r["classifier"] for r in rows}
    lgbm, _ = _REGISTRY["lightgbm"]()
    p = lgbm.get_params()
    assert (p["n_estimators"], p["learning_rate"], p["num_leaves"], p["min_child_samples"],
            p["subsample"], p["colsample_bytree"]) == (200, 0.05, 15, 40, 0.8, 0.8)
    assert "200 trees" in described["lightgbm"] and "15 leaves" in described["lightgbm"]
    forest, _ = _REGISTRY["random_forest"]()
    assert (forest.n_estimators, forest.min_samples_leaf, forest.max_features) == (200, 20, "sqrt")
    assert "200 trees" in described["random_forest"] and "20 rows" in described["random_forest"]
    logit, _ = _REGISTRY["logit"]()
    assert logit[-1].C == 1e6 and "10⁶" in described["logit"]
    lasso, _ = _REGISTRY["lasso_logit"]()
    assert lasso[-1].C == 0.5 and "C = 0.5" in described["lasso_logit"]
    smooth, smooth_reg = _REGISTRY["lightgbm_smooth"]()
    q = smooth.get_params()
    assert (q["n_estimators"], q["num_leaves"], q["min_child_samples"]) == (150, 7, 120)
    assert smooth_reg.get_params() == _REGISTRY["lightgbm"]()[1].get_params()
    assert all(s in described["lightgbm_smooth"] for s in ("150 trees", "7 leaves", "120 rows"))


# --------------------------------------------------------------------------- API and pages
def test_api_page_documents_every_public_name() -> None:
    api = _page("api.rst")
    targets = set(re.findall(r"^\.\. auto\w+:: (\S+)", api, flags=re.M))
    for name in orthoccp.__all__:
        if name == "__version__":
            continue
        if name == "discrete":
            assert "orthoccp.discrete" in targets
            continue
        assert f"orthoccp.{name}" in targets, f"orthoccp.{name} is not on the API page"


def test_toctree_lists_every_page() -> None:
    index = _page("index.md")
    (tree,) = re.findall(r"```\{toctree\}\n(.*?)```", index, flags=re.S)
    entries = [ln.strip() for ln in tree.splitlines() if ln.strip() and not ln.startswith(":")]
    pages = sorted(p.stem for p in DOCS.glob("*") if p.suffix in (".md", ".rst"))
    assert sorted([*entries, "index"]) == pages
    for entry in entries:
        assert (DOCS / f"{entry}.md").exists() or (DOCS / f"{entry}.rst").exists()


def _resolve(dotted: str) -> bool:
    parts = dotted.split(".")
    for i in range(len(parts), 0, -1):
        try:
            obj: Any = importlib.import_module(".".join(parts[:i]))
        except ImportError:
            continue
        try:
            for attr in parts[i:]:
                obj = getattr(obj, attr)
        except AttributeError:
            return False
        return True
    return False


def test_every_orthoccp_name_on_the_pages_exists() -> None:
    # "No page describes a feature that does not exist": every dotted orthoccp name resolves.
    seen = 0
    for path in DOCS.glob("*.md"):
        text = path.read_text(encoding="utf-8")
        for dotted in set(re.findall(r"\borthoccp(?:\.[A-Za-z_]\w*)+", text)):
            dotted = dotted.rstrip(".")
            if dotted.endswith((".py", ".md", ".json", ".toml", ".csv", ".html")):
                continue
            assert _resolve(dotted), f"docs/{path.name} names {dotted}, which does not exist"
            seen += 1
    assert seen >= 20


# --------------------------------------------------------------------------- validation numbers
def _number(cell: str) -> float:
    return float(cell.replace("−", "-").replace("+", "").replace("**", ""))


def _decimals(cell: str) -> int:
    return len(cell.split(".")[1]) if "." in cell else 0


def _assert_printed(cell: str, value: float, where: str) -> None:
    """The cell is ``value`` rounded to the decimals it shows."""
    d = _decimals(cell)
    assert _number(cell) == pytest.approx(round(value, d), abs=0.51 * 10**-d), (
        f"{where}: page {cell!r}, JSON {value!r}"
    )


def _validation_table(heading: str, index: int = 0) -> list[dict[str, str]]:
    return _tables(_section(_page("validation.md"), heading))[index]


def _json(name: str) -> Any:
    return json.loads((RESULTS / name).read_text(encoding="utf-8"))


def test_headline_table_matches_its_json() -> None:
    doc = _json("headline.json")
    blocks = ("plug_in", "debiased", "debiased_renewal_robust")
    for row in _validation_table("## The headline run"):
        name = row["parameter"]
        _assert_printed(row["truth"], doc["truth"][name], name)
        cells = [v for k, v in row.items() if k not in ("parameter", "truth")]
        for i, block in enumerate(blocks):
            p = doc[block]["params"][name]
            _assert_printed(cells[2 * i], p["estimate"], f"{name} {block}")
            _assert_printed(cells[2 * i + 1], p["std_error"], f"{name} {block} s.e.")


def _check_mc_rows(rows: list[dict[str, str]], summary: dict[str, Any], keys: dict[str, str],
                   columns: list[tuple[str, str]]) -> None:
    for row in rows:
        label = next(iter(row.values()))
        stats = summary[keys[label]]
        cells = list(row.values())[1:]
        assert len(cells) == len(columns), label
        for cell, (param, stat) in zip(cells, columns):
            _assert_printed(cell, stats[param][stat], f"{label} {param} {stat}")


def _headline_cell(key: str) -> dict[str, dict[str, Any]]:
    """A finished 200-replication cell of coverage.json: estimator -> parameter -> summary."""
    cell = _json("coverage.json")["cells"][key]
    assert cell["status"] == "finished" and cell["mc"]["reps"] == 200
    by_estimator: dict[str, dict[str, Any]] = {}
    for r in cell["mc"]["summary"]:
        by_estimator.setdefault(r["estimator"], {})[r["parameter"]] = r
    return by_estimator


def test_readme_is_short_with_one_table_that_matches_its_json() -> None:
    """The README is a newcomer's page: at most 150 lines and one results table, the headline
    Monte Carlo cell, whose numbers are coverage.json's (the rest lives in docs/validation.md)."""
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    assert len(readme.splitlines()) <= 150
    tables = _tables(readme)
    assert len(tables) == 1
    _check_mc_rows(
        tables[0], _headline_cell("ebike|N=2000|lightgbm"),
        {"plug-in (cross-fitted, uncorrected)": "naive",
         "debiased (renewal-robust, the default)": "debiased", "oracle (exact nuisances)": "oracle"},
        [(p, k) for p in ("wear_cost", "swap_cost") for k in ("bias", "sd", "mean_se", "rmse", "coverage")],
    )
    assert len(tables[0]) == 3


def test_monte_carlo_tables_match_their_json() -> None:
    w, s = "wear_cost", "swap_cost"
    by_estimator = _headline_cell("ebike|N=2000|lightgbm")
    _check_mc_rows(
        _validation_table("### The headline cell: 2,000 bikes, default options"), by_estimator,
        {"plug-in (cross-fitted, uncorrected)": "naive",
         "debiased (renewal-robust, the default)": "debiased", "oracle (exact nuisances)": "oracle"},
        [(p, k) for p in (w, s) for k in ("bias", "sd", "mean_se", "rmse", "coverage")],
    )
    by_estimator = _headline_cell("producers|N=2000|lightgbm")
    _check_mc_rows(
        _validation_table("### The terminal headline cell: 2,000 producers, default options"),
        by_estimator,
        {"plug-in (cross-fitted, uncorrected)": "naive", "debiased (the default)": "debiased",
         "oracle (exact nuisances)": "oracle"},
        [(p, k) for p in ("fixed_cost", "profit") for k in ("bias", "sd", "mean_se", "rmse", "coverage")],
    )
    steps = _headline_cell("producers|N=2000|lightgbm|ccp_steps=2")
    _check_mc_rows(
        _validation_table("### Model-implied CCP steps on the exit design"),
        {"default": by_estimator["debiased"], "steps": steps["debiased"]},
        {"the default": "default", "2 model-implied CCP steps": "steps"},
        [(p, k) for p in ("fixed_cost", "profit") for k in ("bias", "sd", "mean_se", "rmse", "coverage")],
    )
    # the plug-in and the oracle do not take the steps: the same panels give the same numbers
    for name in ("naive", "oracle"):
        for param in ("fixed_cost", "profit"):
            for stat in ("bias", "sd", "mean_se", "coverage"):
                assert steps[name][param][stat] == by_estimator[name][param][stat], (name, stat)
    by_estimator = _headline_cell("ebike3|N=2000|lightgbm")
    _check_mc_rows(
        _validation_table("### The three-choice headline cell: 2,000 bikes, default options"),
        by_estimator,
        {"plug-in (cross-fitted, uncorrected)": "naive",
         "debiased (renewal-robust, the default)": "debiased", "oracle (exact nuisances)": "oracle"},
        [(p, k) for p in ("wear_cost", "recondition_cost", "swap_cost")
         for k in ("bias", "sd", "mean_se", "rmse", "coverage")],
    )
    _check_mc_rows(
        _validation_table("### Plug-in against debiased, and the two cross-fitting schemes"),
        _json("crossfit_schemes_ebike.json")["summary"],
        {"oracle (exact nuisances)": "oracle", "plug-in, plain": "plug_in_plain",
         "plug-in, nested": "plug_in_nested", "debiased, plain": "debiased_plain",
         "debiased, nested": "debiased_nested"},
        [(p, k) for p in (w, s) for k in ("bias", "sd", "mean_se", "coverage")],
    )
    _check_mc_rows(
        _validation_table("### Standard against renewal-robust moments"),
        _json("renewal_robust_ebike.json")["summary"],
        {"standard": "standard", "renewal-robust": "renewal_robust"},
        [(w, "bias"), (w, "sd"), (w, "mean_se"), (w, "rmse"), (w, "coverage"),
         (s, "bias"), (s, "sd"), (s, "mean_se"), (s, "coverage")],
    )
    _check_mc_rows(
        _validation_table("### Which Jacobian in the sandwich"),
        _json("sandwich_jacobian.json")["summary"],
        {"G = ∂Σm/∂θ (the default)": "G", "J = ∂Σψ/∂θ (finite differences)": "psi_jacobian",
         "G, CCP correction left out": "no_phi_P"},
        [(p, k) for p in (w, s) for k in ("sd", "mean_se", "coverage")],
    )


def test_discrete_tables_match_their_json() -> None:
    summary = _json("discrete_reference.json")["summary"]
    learners = {"cell frequencies": "cell", "logit on a cubic in mileage": "cubic_logit",
                "LightGBM": "lightgbm"}
    for row in _validation_table("### Discrete states, against the full-solution MLE"):
        key = f"{learners[row['orthoccp first stage']]}_{row['estimator'].replace('-', '')}"
        stats = summary[key]
        assert int(row["failed solves"]) == stats["failures"], key
        _assert_printed(row["RMSE / MLE's, RC"], stats["RC"]["rmse_ratio_to_nfxp"], key)
        _assert_printed(row["RMSE / MLE's, θ11"], stats["theta11"]["rmse_ratio_to_nfxp"], key)

    npl = _json("npl_reference.json")
    names = {"full-solution MLE": "nfxp", "NPL (Aguirregabiria & Mira 2002)": "npl",
             "one pseudo-likelihood step": "pml", "forward simulation, 200 paths": "forward"}
    for row in _validation_table("### NPL and forward simulation", 0):
        stats = npl["bus"]["summary"][names[row["estimator"]]]
        _assert_printed(row["RMSE RC"], stats["RC"]["rmse"], row["estimator"])
        _assert_printed(row["RMSE θ11"], stats["theta11"]["rmse"], row["estimator"])
        _assert_printed(row["RMSE / MLE's, RC"], stats["RC"]["rmse_ratio_to_nfxp"], "ratio")
        _assert_printed(row["RMSE / MLE's, θ11"], stats["theta11"]["rmse_ratio_to_nfxp"], "ratio")
        _assert_printed(row["CPU s"], stats["median_cpu_seconds"], "cpu")
        _assert_printed(row["speed-up against the MLE"], stats["speedup_vs_nfxp"], "speed-up")
    inventory = {"NPL": "npl", "forward simulation, 1,000 paths": "forward"}
    for row in _validation_table("### NPL and forward simulation", 1):
        stats = npl["inventory"]["summary"][inventory[row["estimator"]]]
        cells = list(row.values())[1:]
        for cell, param in zip(cells, ("holding", "stockout", "cost_small", "cost_large")):
            _assert_printed(cell, stats[param]["coverage_95"], f"{row['estimator']} {param}")


def test_sieve_table_matches_its_json() -> None:
    """docs/validation.md (the full table and the README's former summary) quotes
    benchmarks/results/sieve_reference.json."""
    grids = {g["config"]["n_states"]: g["summary"] for g in _json("sieve_reference.json")["grids"].values()}
    names = {"full-solution MLE": "nfxp", "one step from cell frequencies": "pml_frequency",
             "one step from the logit sieve": "pml_sieve", "one step from LightGBM": "pml_lightgbm"}
    rows = _validation_table("### Smooth starting CCPs, and larger state spaces")
    assert len(rows) == 4 * len(grids) == 16
    for row in rows:
        stats = grids[int(row["states"])][names[row["estimator"]]]
        where = f"{row['states']} {row['estimator']}"
        _assert_printed(row["RMSE / MLE's, RC"], stats["RC"]["rmse_ratio_to_nfxp"], where)
        _assert_printed(row["RMSE / MLE's, θ11"], stats["theta11"]["rmse_ratio_to_nfxp"], where)
        _assert_printed(row["coverage RC"], stats["RC"]["coverage_95"], where)
        _assert_printed(row["coverage θ11"], stats["theta11"]["coverage_95"], where)
        _assert_printed(row["CPU s"], stats["median_cpu_seconds"], where)
        _assert_printed(row["speed-up, from the DataFrame"], stats["speedup_vs_nfxp"], where)
        if row["estimator"] != "full-solution MLE":
            _assert_printed(row["speed-up, from a built Panel"],
                            stats["from_panel_speedup_vs_nfxp"], where)
    summary = _validation_table("### In brief: smooth starting CCPs against the MLE")
    assert len(summary) == len(grids)
    for row in summary:
        stats = grids[int(row["states"])]["pml_sieve"]
        where = f"summary {row['states']}"
        _assert_printed(row["RMSE / MLE's, RC"], stats["RC"]["rmse_ratio_to_nfxp"], where)
        _assert_printed(row["θ11"], stats["theta11"]["rmse_ratio_to_nfxp"], where)
        coverage_rc, coverage_theta = row["coverage RC / θ11"].split(" / ")
        _assert_printed(coverage_rc, stats["RC"]["coverage_95"], where)
        _assert_printed(coverage_theta, stats["theta11"]["coverage_95"], where)
        _assert_printed(row["speed-up vs MLE (from the DataFrame)"], stats["speedup_vs_nfxp"],
                        where)
        _assert_printed(row["on a built Panel"], stats["from_panel_speedup_vs_nfxp"], where)


def test_scaling_table_matches_its_json() -> None:
    """docs/scaling.md quotes benchmarks/results/scale.json, row by row."""
    doc = _json("scale.json")
    points = {p["rows"]: p for p in doc["points"]}
    rows = _tables(_section(_page("scaling.md"), "## Measured: 10⁴ to 10⁶ rows"))[0]
    assert len(rows) == len(points)
    for row in rows:
        p = points[int(row["rows"].replace(",", ""))]
        assert int(row["bikes"].replace(",", "")) == p["units"]
        _assert_printed(row["total s"], p["wall_s"]["total"], f"{p['rows']} total")
        _assert_printed(row["learner fit s"], p["learner_fit_s"], f"{p['rows']} fit")
        _assert_printed(row["overhead ratio"], p["overhead_ratio"], f"{p['rows']} overhead")
        ratios = p["memory_ratio"]
        _assert_printed(row["peak above imports / state matrix"],
                        ratios["peak_above_imports_over_state_matrix"], f"{p['rows']} memory")
        _assert_printed(row["whole process / state matrix"],
                        ratios["peak_process_over_state_matrix"], f"{p['rows']} process")


def test_scaling_page_quotes_the_allocator_run() -> None:
    """The glibc-setting paragraph of docs/scaling.md matches its own JSON."""
    point = _json("scale_mmap_threshold.json")["points"][0]
    text = _section(_page("scaling.md"), "## Measured: 10⁴ to 10⁶ rows")
    para = text[text.index("**A glibc setting that helps.**"):]
    ratios = point["memory_ratio"]
    for value in (ratios["estimate_peak_above_panel_over_state_matrix"],
                  ratios["peak_above_imports_over_state_matrix"],
                  ratios["peak_process_over_state_matrix"]):
        assert f"{value:.2f}×" in para, value
    assert f"{point['wall_s']['total']:.0f} s" in para


@pytest.mark.parametrize(
    ("heading", "units", "reps", "min_rows"),
    [
        ("### The rest of the grid: 500 units, 50 replications each", 500, 50, 10),
        ("### The L1-penalised logit at 2,000 units: 200 replications each", 2000, 200, 7),
    ],
)
def test_grid_table_matches_coverage_json(heading: str, units: int, reps: int,
                                          min_rows: int) -> None:
    """The grid cells quoted in docs/validation.md are those of coverage.json."""
    cells = _json("coverage.json")["cells"]
    rows = _validation_table(heading)
    assert len(rows) >= min_rows
    for row in rows:
        cell = cells[f"{row['scenario']}|N={units}|{row['first stage']}"]
        assert cell["status"] == "finished" and cell["mc"]["reps"] == reps
        stats = {r["estimator"]: r for r in cell["mc"]["summary"] if r["parameter"] == row["parameter"]}
        where = f"{row['scenario']} {row['first stage']} {row['parameter']}"
        _assert_printed(row["plug-in coverage"], stats["naive"]["coverage"], where)
        _assert_printed(row["debiased coverage"], stats["debiased"]["coverage"], where)
        _assert_printed(row["oracle coverage"], stats["oracle"]["coverage"], where)
        deb = stats["debiased"]
        _assert_printed(row["debiased bias / SD"], deb["bias"] / deb["sd"], where)
        _assert_printed(row["debiased SD / mean s.e."], deb["sd_over_se"], where)


def test_oracle_moment_table_matches_its_json() -> None:
    """The price-of-unknown-CCPs table is benchmarks/results/oracle_moment.json's."""
    cells = _json("oracle_moment.json")["cells"]
    rows = _validation_table("### What the corrected moment can do at best")
    assert len(rows) == 7  # 2 + 3 + 2 parameters of the three headline designs
    for row in rows:
        cell = cells[f"{row['scenario']}|N=2000|lightgbm"]
        # The panels are the coverage cells': the oracle estimates agree exactly.
        assert cell["reps"] == 200 and cell["paired"]["max_abs_oracle_difference"] <= 1e-8
        stats = {r["parameter"]: r for r in cell["paired"]["parameters"]}[row["parameter"]]
        assert stats["paired_reps"] == 200
        where = f"{row['scenario']} {row['parameter']}"
        for column, key in [
            ("RMSE oracle", "rmse_oracle"),
            ("RMSE oracle, corrected moment", "rmse_oracle_debiased"),
            ("RMSE debiased", "rmse_debiased"),
            ("price of unknown CCPs", "price_of_unknown_ccp"),
            ("learner's cost", "learner_cost"),
            ("corrected-moment oracle bias / SD", "bias_over_sd_oracle_debiased"),
        ]:
            _assert_printed(row[column], stats[key], where)
    summary = _validation_table("### In brief: the corrected moment at best")
    assert len(summary) == 7
    for row in summary:
        cell = cells[f"{row['design']}|N=2000|lightgbm"]
        stats = {r["parameter"]: r for r in cell["paired"]["parameters"]}[row["parameter"]]
        where = f"summary {row['design']} {row['parameter']}"
        _assert_printed(row["corrected moment at exact nuisances / oracle"],
                        stats["price_of_unknown_ccp"], where)
        _assert_printed(row["debiased / corrected moment at exact nuisances"],
                        stats["learner_cost"], where)


def test_renewal_ccp_steps_screen_matches_its_json() -> None:
    """The renewal-design bullet of the model-implied steps quotes two 20-panel runs and the
    default cell's first 20 panels (same seeds)."""
    text = _section(_page("validation.md"), "### Model-implied CCP steps on the exit design")
    bullet = " ".join(text[text.index("**Worse in the renewal design"):].split("\n- ")[0].split())
    params = ("wear_cost", "swap_cost")
    quoted: list[float] = []
    for name in ("mc_ebike_N2000_standard_ccpsteps2.json", "mc_ebike_N2000_standard.json"):
        doc = _json(name)
        assert doc["reps"] == 20 and doc["settings"]["seed"] == 0
        rows = {r["parameter"]: r for r in doc["summary"]}
        quoted += [rows[p]["rmse"] for p in params]
    reps = _json("coverage.json")["cells"]["ebike|N=2000|lightgbm"]["mc"]["replications"]
    for p in params:
        err = [r["estimate"] - r["truth"] for r in reps
               if r["estimator"] == "debiased" and r["parameter"] == p and r["rep"] < 20]
        assert len(err) == 20
        quoted.append(float(np.sqrt(np.mean(np.square(err)))))
    for value in quoted:
        assert f"{value:.3f}" in bullet, (value, bullet)


def test_outside_designs_table_matches_its_json() -> None:
    """The outside designs' table is benchmarks/results/outside_designs.json's."""
    doc = _json("outside_designs.json")
    cells = {(c["design"], c["parameter"]): c for c in doc["cells"]}
    rows = _validation_table("### Written outside the project: four designs through the command line")
    assert len(rows) == len(cells) == 13 and doc["failed_runs"] == 0
    for row in rows:
        c = cells[(row["design"], row["parameter"])]
        where = f"{row['design']} {row['parameter']}"
        assert int(row["covered"]) == c["covered"] and int(row["draws"]) == c["runs"], where
        assert int(row["one-step"]) == c["one_step"] and int(row["flagged"]) == c["flagged"], where
        assert row["unflagged covered"] == f"{c['unflagged_covered']} of {c['unflagged']}", where
        for column, key in [("truth", "truth"), ("mean", "mean"), ("SD", "sd"),
                            ("mean s.e.", "mean_se"), ("plug-in mean", "plugin_mean")]:
            _assert_printed(row[column], c[key], where)


def test_outside_split_spread_table_matches_its_json() -> None:
    """The split-noise table is benchmarks/results/outside_split_spread.json's."""
    doc = _json("outside_split_spread.json")
    assert doc["splits"] == 3
    text = _page("validation.md")
    text = text[text.index("**Split noise.**"):]
    rows = _tables(text)[0]
    for row in rows:
        values = [r["split_spread"] for r in doc["rows"]
                  if r["design"] == row["design"] and r["parameter"] == row["parameter"]]
        where = f"{row['design']} {row['parameter']}"
        assert int(row["draws"]) == len(values) > 0, where
        _assert_printed(row["median spread"], float(np.median(values)), where)
        _assert_printed(row["largest spread"], max(values), where)
    assert len(rows) == len({(r["design"], r["parameter"]) for r in doc["rows"]})


@pytest.mark.parametrize("role, marker", [("tuning", "**First screen**"),
                                          ("evaluation", "**Evaluation screen**")])
def test_design_family_screen_matches_its_json(role: str, marker: str) -> None:
    """The family screens' tables are benchmarks/results/design_family.json's: the tuning
    designs in the first screen, the eight drawn evaluation designs in their own."""
    designs = _json("design_family.json")["designs"]
    by_id = {e["id"]: {(r["estimator"], r["parameter"]): r for r in e["summary"]}
             for e in designs.values() if e["role"] == role}
    kinds = {e["id"]: e["kind"] for e in designs.values() if e["role"] == role}
    text = _page("validation.md")
    rows = _tables(text[text.index(marker):])[0]
    assert len(rows) == sum(1 for s in by_id.values() for k in s if k[0] == "debiased")
    for row in rows:
        cell = by_id[row["design"]]
        r, n = cell[("debiased", row["parameter"])], cell[("naive", row["parameter"])]
        where = f"{row['design']} {row['parameter']}"
        assert row.get("kind", kinds[row["design"]]) == kinds[row["design"]], where
        assert int(row["reps"]) == r["reps"] and r["failures"] == 0, where
        assert int(row["fallbacks"]) == r["fallbacks"] and int(row["flagged"]) == r["flagged"], where
        _assert_printed(row["plug-in coverage"], n["coverage"], where)
        _assert_printed(row["debiased bias / SD"], r["bias_over_sd"], where)
        _assert_printed(row["SD / s.e."], r["sd_over_se"], where)
        _assert_printed(row["debiased coverage"], r["coverage"], where)


def test_evaluation_designs_are_the_drawn_ones() -> None:
    """The evaluation screen is the draw its text names: eight designs from the stated draw
    seed, drawn by the benchmark's own function, each with 20 replications."""
    import importlib.util

    spec = importlib.util.spec_from_file_location("design_family_bench",
                                                  ROOT / "benchmarks" / "design_family.py")
    assert spec is not None and spec.loader is not None
    bench = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(bench)
    doc = _json("design_family.json")
    assert doc["evaluation"]["draw_seed"] == 20261205
    assert "draw seed 20261205" in _page("validation.md")
    drawn = [i for i, _ in bench.evaluation_designs(20261205)]
    assert [d["id"] for d in doc["evaluation"]["designs"]] == drawn
    evaluated = sorted(e["id"] for e in doc["designs"].values() if e["role"] == "evaluation")
    assert evaluated == sorted(drawn) and len(drawn) == 8


# --------------------------------------------------------------------------- discount sensitivity
def test_sensitivity_page_matches_its_csv() -> None:
    """The demo table on the sensitivity page is the committed run's CSV, rounded as printed;
    the figure beside it is committed too."""
    import pandas as pd

    text = _page("sensitivity.md")
    table = pd.read_csv(DOCS / "beta_sensitivity.csv")
    block = text[text.index("```text"):]
    block = block[:block.index("```", 7)]
    printed: dict[tuple[str, float], list[float]] = {}
    name = ""
    for line in block.splitlines()[1:]:
        parts = line.replace("*", "").split()
        if len(parts) == 1:
            name = parts[0]
        elif len(parts) == 6 and parts[0] != "discount":
            printed[(name, float(parts[0]))] = [float(v) for v in parts[1:]]
    assert len(printed) == len(table) == 10
    for r in table.itertuples():
        got = printed[(r.parameter, r.discount)]
        want = [r.estimate, r.std_error, r.lower, r.upper, r.plugin]
        assert got == [round(v, 4) for v in want], (r.parameter, r.discount)
    assert "wear_cost −0.9747, swap_cost −4.9387" in text
    assert (DOCS / "beta_sensitivity.png").stat().st_size > 10_000


@pytest.mark.parametrize("name, role, marker", [
    ("interval_calibration.json", "tuning", "**How well the checks separate the breaking cells**"),
    ("interval_calibration_evaluation.json", "evaluation",
     "**How well the checks separate the breaking cells on the evaluation designs**")])
def test_interval_calibration_table_matches_its_json(name: str, role: str, marker: str) -> None:
    """The checks' detection and false-alarm counts are benchmarks/results/<name>'s."""
    report = _json(name)
    assert report["role"] == role
    text = _page("validation.md")
    rows = _tables(text[text.index(marker):])[0]
    assert len(rows) >= 3 and "shipped" in {r["rule"] for r in rows}
    for row in rows:
        s = report["rules"][row["rule"]]["score"]
        assert row["cells below 0.90 flagged"] == f"{s['detected']} of {s['low_cells']}"
        assert row["cells at 0.93 or above flagged"] == f"{s['false_alarms']} of {s['high_cells']}"
        _assert_printed(row["pooled coverage of unflagged cells"], s["unflagged_pooled_coverage"],
                        row["rule"])
    if role == "evaluation":  # the README's headline quotes the evaluation screen
        s = report["rules"]["shipped"]["score"]
        readme = " ".join((ROOT / "README.md").read_text(encoding="utf-8").split())
        assert f"cover {s['unflagged_pooled_coverage']:.3f} pooled" in readme
        assert f"caught {s['detected']} of the {s['low_cells']} cells" in readme


_DIAGNOSIS_LABELS = {"linearised at the truth": "linearised_at_truth",
                     "solution of Σψ = 0": "solved", "one-step": "one_step"}


def test_interaction_diagnosis_table_matches_its_json() -> None:
    """The exact-nuisance diagnosis of the interaction slope is
    benchmarks/results/interaction_diagnosis_<design>.json's."""
    rows = _validation_table("### Why the interaction slopes under-cover", 0)
    assert {r["design"] for r in rows} == {"F24", "F20"}
    for row in rows:
        doc = _json(f"interaction_diagnosis_{row['design']}.json")
        assert doc["reps"] == 40
        c = doc["summary"][_DIAGNOSIS_LABELS[row["estimator"]]][row["parameter"]]
        where = f"{row['design']} {row['estimator']}"
        _assert_printed(row["SD / mean s.e."], c["sd_over_mean_se"], where)
        _assert_printed(row["coverage"], c["coverage"], where)
        _assert_printed(row["correlation of error and s.e."], c["corr_abs_error_se"], where)


def test_unseen_variance_table_matches_the_family_json() -> None:
    """The unseen-variance check's cells are the rechecked replications of
    benchmarks/results/design_family.json: flags before and after, and the coverage of the
    interval widened by sqrt(1 + max(0, U))."""
    designs = {e["id"]: e for e in _json("design_family.json")["designs"].values()}
    rows = _validation_table("### Why the interaction slopes under-cover", 1)
    assert len(rows) >= 4
    for row in rows:
        reps = [r for r in designs[row["design"]]["mc"]["replications"]
                if r["estimator"] == "debiased" and r["parameter"] == row["parameter"]]
        where = f"{row['design']} {row['parameter']}"
        assert all(r.get("unseen_variance") is not None for r in reps), where
        assert int(row["reps"]) == len(reps), where
        _assert_printed(row["coverage"], sum(r["covers"] for r in reps) / len(reps), where)
        assert int(row["flagged before"]) == sum(r["flagged_previous"] for r in reps), where
        assert int(row["flagged now"]) == sum(r["flagged"] for r in reps), where
        widened = [abs(r["estimate"] - r["truth"]) <= 1.959964 * r["std_error"]
                   * (1 + max(0.0, r["unseen_variance"])) ** 0.5 for r in reps]
        _assert_printed(row["coverage, widened"], sum(widened) / len(reps), where)


def test_correction_weights_table_matches_its_json() -> None:
    """The paired runs of the two correction weightings are
    benchmarks/results/correction_weights_<design>.json's."""
    rows = _validation_table("### Why the interaction slopes under-cover", 2)
    assert {r["correction weights"] for r in rows} == {"solution", "plugin"}
    for row in rows:
        doc = _json(f"correction_weights_{row['design']}.json")
        c = doc["summary"][row["correction weights"]][row["parameter"]]
        where = f"{row['design']} {row['parameter']} {row['correction weights']}"
        assert int(row["reps"]) == doc["reps"], where
        _assert_printed(row["coverage"], c["coverage"], where)
        _assert_printed(row["SD / mean s.e."], c["sd_over_mean_se"], where)
        _assert_printed(row["RMSE"], c["rmse"], where)
        _assert_printed(row["flagged"], c["flag_rate"], where)


def test_counterfactual_accuracy_table_matches_its_json() -> None:
    """The averagers' errors are benchmarks/results/counterfactual_accuracy.json's."""
    doc = _json("counterfactual_accuracy.json")
    rows = _tables(_section(_page("validation.md"), "## Counterfactuals"))[0]
    assert len(rows) == len(doc["summary"]) == 9
    for row in rows:
        s = doc["summary"][f"{row['scenario']}|{row['averager']}"]
        where = f"{row['scenario']} {row['averager']}"
        _assert_printed(row["exact change"], s["exact_change_mean"], where)
        _assert_printed(row["mean abs. relative error"].removesuffix(" %"),
                        100 * s["mean_abs_relative_error"], where)
        _assert_printed(row["max"].removesuffix(" %"), 100 * s["max_abs_relative_error"], where)
        _assert_printed(row["baseline CCP MAE"], s["baseline_mae"], where)
        _assert_printed(row["time / estimate"], s["seconds_over_estimate"], where)


def test_outside_counterfactual_paragraph_matches_its_json() -> None:
    """The outside design's counterfactual numbers are benchmarks/results/outside_counterfactual.json's."""
    d = _json("outside_counterfactual.json")["summary"]
    text = _section(_page("validation.md"), "## Counterfactuals")
    for value in (f"{d['truth']:.4f}", f"{d['mean_change']:.4f}", f"{d['sd']:.4f}",
                  f"{d['mean_se']:.4f}", f"SD/s.e. {d['sd_over_se']:.2f}",
                  f"in {d['covered']} of {d['draws']} draws",
                  f"{100 * d['bias_over_truth']:+.1f} % of the truth"):
        assert value in text, value


@pytest.mark.parametrize(("name", "heading"), [
    ("paired_rerun.json", "### The headline cells after the canonical fold key"),
    ("paired_rerun_streams.json", "### The headline cells after the named random streams"),
])
def test_paired_rerun_table_matches_its_json(name: str, heading: str) -> None:
    """The headline cells rerun on the same panels: benchmarks/results/paired_rerun*.json."""
    doc = _json(name)
    rows = _tables(_section(_page("validation.md"), heading))[0]
    expected = {(k.replace("|", ", "), p["parameter"]): p for k, c in doc["cells"].items()
                for p in c["parameters"]}
    assert len(rows) == len(expected) == 7
    for row in rows:
        p = expected[(row["cell"], row["parameter"])]
        where = f"{row['cell']} {row['parameter']}"
        assert int(row["replications"]) == p["reps"] and int(row["changed"]) == p["coverage_changed"]
        _assert_printed(row["coverage before"], p["old"]["coverage"], where)
        _assert_printed(row["coverage after"], p["new"]["coverage"], where)
        _assert_printed(row["SD/s.e. before"], p["old"]["sd"] / p["old"]["mean_se"], where)
        _assert_printed(row["SD/s.e. after"], p["new"]["sd"] / p["new"]["mean_se"], where)
        _assert_printed(row["shift mean"], p["shift_mean"], where)
        _assert_printed(row["shift SD"], p["shift_sd"], where)


def test_counterfactual_coverage_table_matches_its_json() -> None:
    """The counterfactual Monte Carlo: benchmarks/results/counterfactual_coverage.json."""
    doc = _json("counterfactual_coverage.json")
    cell = next(iter(doc["cells"].values()))["summary"]
    section = _section(_page("validation.md"), "## Counterfactuals")
    rows = [t for t in _tables(section) if "statistic (difference)" in t[0]][0]
    assert len(rows) == len(cell) == 2
    for row in rows:
        s = cell[row["statistic (difference)"]]
        where = row["statistic (difference)"]
        assert int(row["replications"]) == s["reps"]
        for column, key in (("truth", "truth"), ("bias", "bias"), ("bias / SD", "bias_over_sd"),
                            ("SD", "sd"), ("mean s.e.", "mean_se"), ("coverage", "coverage")):
            _assert_printed(row[column], s[key], where)


# --------------------------------------------------------------------------- games
def test_games_monte_carlo_table_matches_its_json() -> None:
    """The games Monte Carlo table is benchmarks/results/games_am2007.json's, as printed."""
    doc = _json("games_am2007.json")
    cells = {(str(e["experiment"]), est, name): (v, s["fallbacks"], e["reps"])
             for e in doc["experiments"] for est, s in e["estimators"].items()
             for name, v in s["parameters"].items()}
    rows = _validation_table("## Games: the entry-exit design of Aguirregabiria and Mira (2007)")
    assert len(rows) == len(cells)
    for row in rows:
        v, fallbacks, reps = cells[(row["experiment"], row["estimator"], row["parameter"])]
        where = f"{row['experiment']} {row['estimator']} {row['parameter']}"
        assert int(row["reps"]) == reps and int(row["fallbacks"]) == fallbacks, where
        _assert_printed(row["bias"], v["bias"], where)
        _assert_printed(row["SD / s.e."], v["sd_over_se"], where)
        _assert_printed(row["coverage"], v["coverage"], where)


def test_types_monte_carlo_table_matches_its_json() -> None:
    """The finite-type Monte Carlo table is benchmarks/results/types_mc.json's (500 units),
    types_mc_2000.json's (2,000 units) and types_mc_data.json's (CCPs updated from the data),
    as printed."""
    docs = {(str(d["units"]), d.get("ccp_update", "model")): d for d in (
        _json("types_mc.json"), _json("types_mc_2000.json"), _json("types_mc_data.json"))}
    rows = _validation_table("## Unobserved types: a two-type renewal design")
    models = {"two types, model update": ("model", "types"),
              "two types, data update": ("data", "types"),
              "one type": ("model", "ignoring_types")}
    assert len(rows) == sum(len(d["types"]) for d in docs.values()) + sum(
        len(d["ignoring_types"]) for (_, upd), d in docs.items() if upd == "model")
    for row in rows:
        update, block = models[row["model"]]
        doc = docs[(row["units"].replace(",", ""), update)]
        v = doc[block][row["parameter"]]
        where = f"{row['units']} {row['model']} {row['parameter']}"
        assert doc["failed"] == 0 and int(row["reps"]) == doc["reps"], where
        _assert_printed(row["truth"], doc["truth"][row["parameter"]], where)
        _assert_printed(row["bias"], v["bias"], where)
        _assert_printed(row["SD / s.e."], v["sd_over_se"], where)
        _assert_printed(row["coverage"], v["coverage"], where)


def test_types_bootstrap_table_matches_its_json() -> None:
    """The bootstrap check's table is benchmarks/results/types_bootstrap.json's."""
    doc = _json("types_bootstrap.json")
    section = _section(_page("validation.md"), "## Unobserved types: a two-type renewal design")
    rows = _tables(section[section.index("**The unit bootstrap as the check**"):])[0]
    assert len(rows) == sum(len(u["table"]) for u in doc["updates"].values()) == 8
    assert doc["draws"] == 199
    for row in rows:
        r = doc["updates"][row["update"]]["table"][row["parameter"]]
        where = f"{row['update']} {row['parameter']}"
        _assert_printed(row["sandwich s.e."], r["std_error"], where)
        _assert_printed(row["bootstrap SD"], r["bootstrap_sd"], where)
        _assert_printed(row["ratio"], r["ratio"], where)


def test_types_covariate_table_matches_its_json() -> None:
    """The covariate-dependent type probabilities' table is
    benchmarks/results/types_mc_covariate.json's."""
    doc = _json("types_mc_covariate.json")
    section = _section(_page("validation.md"), "## Unobserved types: a two-type renewal design")
    rows = _tables(section[section.index("**Type probabilities that depend on a unit"):])[0]
    assert doc["failed"] == 0 and len(rows) == len(doc["types"]) == 5
    for row in rows:
        v = doc["types"][row["parameter"]]
        _assert_printed(row["truth"], doc["truth"][row["parameter"]], row["parameter"])
        _assert_printed(row["bias"], v["bias"], row["parameter"])
        _assert_printed(row["SD / s.e."], v["sd_over_se"], row["parameter"])
        _assert_printed(row["coverage"], v["coverage"], row["parameter"])
