"""The overwrite policy of every command that writes files.

A command names all the files it is about to write (including companions such as
``sites.csv.json`` beside ``sites.csv`` or ``frames.truth.h5`` beside ``frames.tif``) and
all the files it reads, and calls :func:`check_outputs` *before* any work is done:

- an output that is one of the inputs (same path, a symbolic link to it, or a hard link) is
  refused, even with ``--force``: a command never writes over what it reads;
- an output that exists is refused unless ``force`` is true (``--force``);
- an output that is an existing folder is refused.

All refusals are :class:`~latticeread.errors.OutputExistsError` (exit code 4, "output
problem"). :func:`check_suffix` refuses an output name the command cannot write
(:class:`~latticeread.errors.UsageError`, exit code 2).
"""

from __future__ import annotations

import os
from collections.abc import Iterable, Mapping
from pathlib import Path

from latticeread.errors import OutputExistsError, UsageError

__all__ = ["check_outputs", "check_suffix", "same_file"]


def same_file(a, b) -> bool:
    """True when the paths ``a`` and ``b`` name the same file (after links), False otherwise."""
    a, b = Path(os.fspath(a)), Path(os.fspath(b))
    try:
        if a.resolve() == b.resolve():
            return True
        return a.exists() and b.exists() and os.path.samefile(a, b)
    except OSError:
        return False


def _named_inputs(inputs) -> list[tuple[str, Path]]:
    if inputs is None:
        return []
    if isinstance(inputs, Mapping):
        items = []
        for role, value in inputs.items():
            if value is None:
                continue
            values = [value] if isinstance(value, (str, os.PathLike)) else list(value)
            items += [(str(role), Path(os.fspath(v))) for v in values if v is not None]
        return items
    return [("input", Path(os.fspath(v))) for v in inputs if v is not None]


def check_outputs(outputs: Iterable, *, force: bool, inputs=None) -> list[Path]:
    """Refuse to write over an input, and over an existing file without ``force``.

    Parameters
    ----------
    outputs : iterable of str or PathLike
        Every file the command will write (``None`` entries are skipped).
    force : bool
        Whether the user allowed replacing existing outputs (``--force``).
    inputs : iterable of paths, or mapping of role -> path(s), optional
        Files the command reads. With a mapping the message names the role
        (``{"calibration": cal_path, "frames": [a, b]}``).

    Returns
    -------
    list of Path
        The outputs as paths, in the order given.

    Raises
    ------
    OutputExistsError
        An output is one of the inputs, is an existing folder, or exists and ``force`` is
        false.
    """
    named = _named_inputs(inputs)
    paths = [Path(os.fspath(p)) for p in outputs if p is not None]
    for out in paths:
        for role, source in named:
            if same_file(out, source):
                raise OutputExistsError(
                    f"refusing to write {out}: it is the {role} this command reads; choose another output name "
                    "(--force never replaces an input)")
        if out.is_dir():
            raise OutputExistsError(f"cannot write {out}: a folder of that name already exists")
        if out.exists() and not force:
            raise OutputExistsError(f"{out} already exists; pass --force to replace it, or choose another name")
    return paths


def check_suffix(path, suffixes: Mapping[str, str] | Iterable[str], *, what: str) -> str:
    """Return the lower-case suffix of ``path`` or refuse a name the command cannot write.

    Parameters
    ----------
    path : str or PathLike
        The output name given by the user.
    suffixes : mapping of suffix -> description, or iterable of suffixes
        Accepted suffixes with a leading dot (``{".csv": "per-site table"}``).
    what : str
        What the file is, for the message ("the report", "the calibration file").

    Raises
    ------
    UsageError
        The suffix is not one of ``suffixes``.
    """
    path = Path(os.fspath(path))
    if not isinstance(suffixes, Mapping):
        suffixes = {s: "" for s in suffixes}
    suffix = path.suffix.lower()
    if suffix not in suffixes:
        choices = ", ".join(f"{s} ({d})" if d else s for s, d in suffixes.items())
        raise UsageError(f"{what} {path} must end in one of: {choices}")
    return suffix
