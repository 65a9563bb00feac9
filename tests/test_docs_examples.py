"""Every code example in ``docs/`` runs, so the documentation cannot rot.

Each page (``docs/*.md`` and ``docs/*.rst``) is one test. Its code blocks run in the order
they appear, in one temporary folder that is the working directory:

* ``python`` blocks run in one namespace per page, so a tutorial builds on its earlier steps;
* ``bash`` / ``console`` / ``shell`` / ``sh`` blocks hold ``orthoccp`` command lines, run
  in-process through :func:`orthoccp.cli.main`; each must exit with code 0;
* ``toml`` blocks must be valid TOML and, after they are merged into a minimal spec when they
  are a fragment, pass :func:`orthoccp.spec.parse_spec`.

Two markers, written as an HTML comment on the line before a block, change that:
``<!-- docs-test: skip: REASON -->`` leaves the block out (the reason is required), and
``<!-- docs-test: file NAME -->`` also writes the block to ``NAME`` in the page's folder, so
that later command lines can use it. Blocks of any other language (``text`` for printed
output) are not code and are not run.

The docstring examples that the API page shows run too (doctest), for the modules that no
other test file already covers.
"""

from __future__ import annotations

import contextlib
import doctest
import importlib
import io
import re
import shlex
import sys
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest

from orthoccp.cli import main
from orthoccp.spec import parse_spec

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10 only
    import tomli as tomllib

DOCS = Path(__file__).resolve().parent.parent / "docs"
PYTHON = {"python", "py", "python3"}
SHELL = {"bash", "console", "shell", "sh"}
TOML = {"toml"}
RUNNABLE = PYTHON | SHELL | TOML

_FENCE = re.compile(r"^(?P<fence>`{3,}|~{3,})\s*(?P<info>[^`]*)$")
_RST_CODE = re.compile(r"^\.\. (?:code-block|code|sourcecode)::\s*(?P<lang>\S+)\s*$")
_MARKER = re.compile(r"^<!--\s*docs-test:\s*(?P<what>[a-z]+)\s*:?\s*(?P<arg>.*?)\s*-->$")

# The spec a TOML fragment is merged into before it is validated (the fragment's tables
# replace or extend these keys).
_BASE_SPEC: dict[str, dict[str, Any]] = {
    "data": {"unit": "bike", "period": "week", "choice": "action", "states": ["wear", "x0"]},
    "model": {"kind": "renewal", "anchor": "swap", "discount": 0.95},
    "utility": {"keep": {"wear_cost": "wear_scaled"}, "swap": {"swap_cost": "1"}},
}


@dataclass(frozen=True)
class Block:
    """One fenced code block of a page."""

    page: str
    line: int
    lang: str
    code: str
    skip: str | None = None
    file: str | None = None

    @property
    def where(self) -> str:
        return f"docs/{self.page}:{self.line}"


def _marker(previous: list[str], where: str) -> tuple[str | None, str | None]:
    """The ``docs-test`` marker on the last non-blank line before a block."""
    for text in reversed(previous):
        if not text.strip():
            continue
        m = _MARKER.match(text.strip())
        if not m:
            return None, None
        what, arg = m.group("what"), m.group("arg")
        if what == "skip":
            if not arg:
                raise AssertionError(f"{where}: a skipped block must give its reason")
            return arg, None
        if what == "file":
            if not arg or "/" in arg:
                raise AssertionError(f"{where}: 'file' needs a plain file name, got {arg!r}")
            return None, arg
        raise AssertionError(f"{where}: unknown docs-test marker {what!r} (skip or file)")
    return None, None


def markdown_blocks(page: str, text: str) -> Iterator[Block]:
    """Fenced blocks of a Markdown page (MyST directives such as ```{toctree} excluded)."""
    lines = text.splitlines()
    i = 0
    while i < len(lines):
        m = _FENCE.match(lines[i].strip()) if len(lines[i]) - len(lines[i].lstrip()) < 4 else None
        if not m:
            i += 1
            continue
        fence, info = m.group("fence"), m.group("info").strip()
        start = i
        body: list[str] = []
        i += 1
        while i < len(lines) and not (
            lines[i].strip().startswith(fence) and set(lines[i].strip()) == {fence[0]}
        ):
            body.append(lines[i])
            i += 1
        i += 1
        lang = info.split()[0].lower() if info else ""
        if lang.startswith("{"):
            continue
        skip, file = _marker(lines[:start], f"docs/{page}:{start + 1}")
        yield Block(page, start + 1, lang, "\n".join(body) + "\n", skip, file)


def rst_blocks(page: str, text: str) -> Iterator[Block]:
    """``.. code-block:: LANG`` blocks of a reStructuredText page."""
    lines = text.splitlines()
    for i, line in enumerate(lines):
        m = _RST_CODE.match(line.strip())
        if not m:
            continue
        indent = len(line) - len(line.lstrip())
        body: list[str] = []
        for nxt in lines[i + 1:]:
            if nxt.strip() and len(nxt) - len(nxt.lstrip()) <= indent:
                break
            body.append(nxt)
        code_lines = [b for b in body if not b.strip().startswith(":")]  # directive options
        deepest = min((len(b) - len(b.lstrip()) for b in code_lines if b.strip()), default=0)
        code = "\n".join(b[deepest:] for b in code_lines).strip("\n") + "\n"
        skip = None
        prev = [ln for ln in lines[:i] if ln.strip()]
        if prev and prev[-1].strip().startswith(".. docs-test: skip:"):
            skip = prev[-1].split("skip:", 1)[1].strip() or None
            if skip is None:
                raise AssertionError(f"docs/{page}:{i + 1}: a skipped block must give its reason")
        yield Block(page, i + 1, m.group("lang").lower(), code, skip, None)


def page_blocks(path: Path) -> list[Block]:
    text = path.read_text(encoding="utf-8")
    page = path.relative_to(DOCS).as_posix()
    if path.suffix == ".rst":
        return list(rst_blocks(page, text))
    return list(markdown_blocks(page, text))


def doc_pages() -> list[Path]:
    return sorted(
        p for p in DOCS.rglob("*") if p.suffix in (".md", ".rst") and "_build" not in p.parts
    )


# --------------------------------------------------------------------------- runners
def shell_commands(code: str, where: str) -> list[list[str]]:
    """The command lines of a shell block (continuations joined, comments dropped)."""
    joined = re.sub(r"\\\n\s*", " ", code)
    commands = []
    for raw in joined.splitlines():
        line = raw.strip()
        if line.startswith("$ "):
            line = line[2:]
        if not line or line.startswith("#"):
            continue
        argv = shlex.split(line, comments=True)
        if not argv:
            continue
        bad = {"|", "&&", ";", ">", "<"} & set(argv)
        if argv[0] != "orthoccp" or bad:
            raise AssertionError(
                f"{where}: {line!r} is not a plain orthoccp command line; run only orthoccp "
                f"commands in shell examples, or mark the block "
                f"'<!-- docs-test: skip: REASON -->'"
            )
        commands.append(argv[1:])
    return commands


def run_shell(block: Block) -> None:
    for argv in shell_commands(block.code, block.where):
        out, err = io.StringIO(), io.StringIO()
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            code = main(argv)
        assert code == 0, (
            f"{block.where}: 'orthoccp {shlex.join(argv)}' exited with {code}\n"
            f"stdout:\n{out.getvalue()[-2000:]}\nstderr:\n{err.getvalue()[-2000:]}"
        )


def run_toml(block: Block, folder: Path) -> None:
    try:
        doc = tomllib.loads(block.code)
    except tomllib.TOMLDecodeError as exc:
        raise AssertionError(f"{block.where}: not valid TOML: {exc}") from exc
    spec = doc
    if "data" not in doc:  # a fragment: validate it inside a minimal spec
        spec = {k: dict(v) for k, v in _BASE_SPEC.items()}
        for table, values in doc.items():
            if isinstance(values, dict) and table != "utility":
                spec.setdefault(table, {}).update(values)
            else:
                spec[table] = values
    parse_spec(spec, base_dir=folder)
    if block.file is not None:
        (folder / block.file).write_text(block.code, encoding="utf-8")


def run_page(path: Path, folder: Path) -> int:
    """Run the page's blocks in order; returns how many ran."""
    namespace: dict[str, Any] = {"__name__": f"docs_{path.stem}"}
    ran = 0
    for block in page_blocks(path):
        if block.skip is not None or block.lang not in RUNNABLE:
            continue
        if block.lang in PYTHON:
            exec(compile(block.code, block.where, "exec"), namespace)  # noqa: S102
        elif block.lang in SHELL:
            run_shell(block)
        else:
            run_toml(block, folder)
        ran += 1
    return ran


# --------------------------------------------------------------------------- tests
PAGES = doc_pages()


@pytest.mark.parametrize("path", PAGES, ids=[p.relative_to(DOCS).as_posix() for p in PAGES])
def test_page_examples_run(
    path: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("MPLBACKEND", "Agg")
    monkeypatch.setenv("OMP_WAIT_POLICY", "PASSIVE")
    run_page(path, tmp_path)


# The API page shows the docstrings' examples too. Those of data, model, results and
# estimate run in tests/test_docstrings.py, those of the discrete modules and anchor in
# tests/test_discrete.py; these are the rest of the modules on the API page that have any.
DOCSTRING_MODULES = [
    "orthoccp.spec._records", "orthoccp.cell", "orthoccp.montecarlo._replicate",
    "orthoccp.montecarlo._run",
    "orthoccp.custom._spec",
    "orthoccp.reference._bellman", "orthoccp.reference._bus", "orthoccp.reference._nfxp",
]


@pytest.mark.parametrize("name", DOCSTRING_MODULES)
def test_docstring_examples_on_the_api_page_run(name: str) -> None:
    result = doctest.testmod(importlib.import_module(name), optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.attempted > 0 and result.failed == 0


def test_pages_have_examples_and_skips_are_rare() -> None:
    # The tutorial pages must actually contain runnable examples (else the runner could be
    # silently extracting nothing), and skipped blocks stay exceptions.
    blocks = {p.name: page_blocks(p) for p in PAGES}
    for name in ("getting_started.md", "cli.md", "learners.md"):
        runnable = [b for b in blocks[name] if b.lang in RUNNABLE and b.skip is None]
        assert len(runnable) >= 3, f"{name}: only {len(runnable)} runnable examples found"
    every = [b for bs in blocks.values() for b in bs if b.lang in RUNNABLE]
    skipped = [b for b in every if b.skip is not None]
    assert len(skipped) <= len(every) // 5, [b.where for b in skipped]


def test_extractor_reads_fences_markers_and_rst() -> None:
    md = (
        "text\n\n```python\nx = 1\n```\n\n<!-- docs-test: skip: needs a network -->\n"
        "```bash\npip install orthoccp\n```\n\n```{toctree}\napi\n```\n\n"
        "<!-- docs-test: file s.toml -->\n````toml\n[a]\nb = 1\n````\n"
    )
    got = list(markdown_blocks("x.md", md))
    assert [(b.lang, b.skip, b.file, b.line) for b in got] == [
        ("python", None, None, 3),
        ("bash", "needs a network", None, 8),
        ("toml", None, "s.toml", 17),
    ]
    assert got[0].code == "x = 1\n"
    rst = "Title\n=====\n\n.. code-block:: python\n   :caption: c\n\n   y = 2\n   z = y\n\nafter\n"
    (b,) = list(rst_blocks("x.rst", rst))
    assert (b.lang, b.code) == ("python", "y = 2\nz = y\n")
    with pytest.raises(AssertionError, match="reason"):
        list(markdown_blocks("x.md", "<!-- docs-test: skip -->\n```python\npass\n```\n"))
    with pytest.raises(AssertionError, match="not a plain orthoccp command"):
        shell_commands("pip install orthoccp\n", "x.md:1")
    assert shell_commands("orthoccp estimate a.csv \\\n  --spec s.toml  # rerun\n", "x") == [
        ["estimate", "a.csv", "--spec", "s.toml"]
    ]
