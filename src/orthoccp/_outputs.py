"""Output files: checked before any work runs, never two outputs on one file, I/O errors named.

Every command and API function that writes files calls :func:`check_outputs` before its
(possibly long) estimation, so a bad path fails in the first second instead of after the run,
and :func:`writing` around the write itself, so an I/O error names the file.
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Iterator, Mapping
from pathlib import Path

from ._errors import InputError

__all__ = ["check_output", "check_outputs", "named_os_error", "writing"]


def _nearest_existing(path: Path) -> Path:
    """``path``'s nearest ancestor that exists (its folder, or a folder above it)."""
    parent = path.parent
    while not parent.exists() and parent != parent.parent:
        parent = parent.parent
    return parent


def check_output(path: str | os.PathLike[str], *, option: str) -> Path:
    """Check that ``path`` can be written, before any work runs.

    The path is not a folder; its folder exists (or the nearest existing folder above it is
    a writable folder, where the missing ones will be created); and an existing regular file
    can be opened for writing. The probe opens the file for appending (nothing is truncated)
    and removes a file it created, so a read-only file, a file in a read-only folder or a
    system file that refuses writes (``/proc/...``) is reported now.

    Parameters
    ----------
    path : path-like
        The output file.
    option : str
        The option or argument that names it, for the message (``"--json"``, ``"path"``).

    Returns
    -------
    pathlib.Path

    Raises
    ------
    orthoccp.InputError
        Naming the option, the path and the fix.
    """
    p = Path(path)
    shown = str(p)
    if p.is_dir():
        raise InputError(f"{option} {shown!r} is a folder; give a file name inside it.")
    folder = _nearest_existing(p)
    if not folder.is_dir():
        raise InputError(
            f"{option} {shown!r} cannot be created: {str(folder)!r} is a file, not a folder; "
            f"choose another path."
        )
    if not os.access(folder, os.W_OK | os.X_OK):
        raise InputError(
            f"{option} {shown!r} cannot be created: the folder {str(folder)!r} is not "
            f"writable; choose a folder you can write to."
        )
    if p.exists() and not p.is_file():
        return p  # a device such as /dev/null or a named pipe: opening could block
    if folder != p.parent:
        return p  # its folder is created when the output is written
    existed = p.exists()
    try:
        with open(p, "a", encoding="utf-8"):
            pass
    except OSError as exc:
        reason = exc.strerror or type(exc).__name__
        raise InputError(
            f"{option} {shown!r} cannot be written ({reason}); choose another path."
        ) from exc
    if not existed:
        with contextlib.suppress(OSError):
            p.unlink()
    return p


def check_outputs(outputs: Mapping[str, str | os.PathLike[str] | None], *,
                  inputs: Mapping[str, str | os.PathLike[str] | None] | None = None) -> None:
    """:func:`check_output` for each named output, and no two on the same file.

    Parameters
    ----------
    outputs : mapping
        Option (or description) -> output path; ``None`` entries are skipped.
    inputs : mapping, optional
        Option -> input file that no output may overwrite (the data, the spec).

    Raises
    ------
    orthoccp.InputError
        For a path that cannot be written, or two outputs (or an output and an input) that
        name the same file.
    """
    seen: dict[Path, str] = {}
    for option, value in (inputs or {}).items():
        if value is not None:
            seen[Path(value).resolve()] = f"the input {option} {str(value)!r}"
    for option, value in outputs.items():
        if value is None:
            continue
        p = Path(value)
        key = p.resolve()
        if key in seen:
            raise InputError(
                f"{option} {str(value)!r} is the same file as {seen[key]}; one would overwrite "
                f"the other. Give each output its own file name."
            )
        seen[key] = f"{option} {str(value)!r}"
    for option, value in outputs.items():
        if value is not None:
            check_output(value, option=option)


def named_os_error(exc: OSError, path: str | os.PathLike[str], action: str) -> Exception:
    """``exc`` naming ``path``: the same error type with the file name set, or an
    :class:`~orthoccp.InputError` when the error carries no error number (a corrupt
    compressed file, say)."""
    if exc.filename is not None:
        return exc
    if exc.errno is not None:
        try:
            return type(exc)(exc.errno, f"could not {action} the file ({exc.strerror})", str(path))
        except TypeError:
            return OSError(exc.errno, f"could not {action} the file ({exc.strerror})", str(path))
    return InputError(f"could not {action} {str(path)!r}: {exc or type(exc).__name__}.")


@contextlib.contextmanager
def writing(path: str | os.PathLike[str]) -> Iterator[Path]:
    """Context for writing ``path``: an :class:`OSError` inside names the file."""
    p = Path(path)
    try:
        yield p
    except OSError as exc:
        raise named_os_error(exc, p, "write") from exc
