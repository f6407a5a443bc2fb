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

The window follows the same policy with a question instead of ``--force``:
:func:`outputs_to_replace` refuses outputs that are inputs (or folders) and returns the
existing outputs the user must agree to replace, and :func:`describe_existing` says in a few
words what such a file holds ("a run file with 176 frames"), for the question.
"""

from __future__ import annotations

import os
from collections.abc import Iterable, Mapping
from pathlib import Path

from latticeread.errors import OutputExistsError, UsageError

__all__ = ["check_outputs", "check_suffix", "same_file", "outputs_to_replace", "describe_existing",
           "existing_kind"]


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
    paths = outputs_to_replace(outputs, inputs=inputs)
    for out in paths:
        if out.exists() and not force:
            raise OutputExistsError(f"{out} already exists; pass --force to replace it, or choose another name")
    return [Path(os.fspath(p)) for p in outputs if p is not None]


def outputs_to_replace(outputs: Iterable, *, inputs=None) -> list[Path]:
    """The outputs that exist (and would be replaced); refuse inputs and folders.

    Parameters
    ----------
    outputs : iterable of str or PathLike
        Every file about to be written (``None`` entries are skipped).
    inputs : iterable of paths, or mapping of role -> path(s), optional
        Files the command or the window reads (see :func:`check_outputs`).

    Returns
    -------
    list of Path
        The existing outputs, in the order given.

    Raises
    ------
    OutputExistsError
        An output is one of the inputs, or an existing folder.
    """
    named = _named_inputs(inputs)
    existing = []
    for out in (Path(os.fspath(p)) for p in outputs if p is not None):
        for role, source in named:
            if same_file(out, source):
                raise OutputExistsError(
                    f"refusing to write {out}: it is the {role} this command reads; choose another output name "
                    "(--force never replaces an input)")
        if out.is_dir():
            raise OutputExistsError(f"cannot write {out}: a folder of that name already exists")
        if out.exists():
            existing.append(out)
    return existing


def existing_kind(path) -> str:
    """What kind of file ``path`` is, from its first bytes and header only.

    Returns
    -------
    str
        One of ``"run"`` (a run file of batch, watch or an HDF5 export), ``"session"`` (a
        session file), ``"session-results"`` (the HDF5 results of a session),
        ``"calibration"``, ``"camera"``, ``"observables"``, ``"hdf5"``, ``"json"``, ``"tiff"``,
        ``"png"``, ``"svg"``, ``"csv"``, ``"file"`` (anything else), or ``"missing"``.
    """
    return _inspect(Path(os.fspath(path)))[0]


def describe_existing(path) -> str:
    """A few words on what the existing file ``path`` holds, its size and modification time.

    For example ``"run.h5: a run file with 176 frames (1.2 MB, modified 2026-12-03 13:45)"``.
    Reads only the header of the file; never raises for an unreadable file.
    """
    path = Path(os.fspath(path))
    kind, what = _inspect(path)
    if kind == "missing":
        return f"{path.name}: no longer exists"
    try:
        st = path.stat()
        import datetime as _dt

        when = _dt.datetime.fromtimestamp(st.st_mtime).strftime("%Y-%m-%d %H:%M")
        size = st.st_size
        amount = (f"{size / 2**20:.1f} MB" if size >= 2**20 else f"{size / 2**10:.0f} kB" if size >= 2**10
                  else f"{size} bytes")
        tail = f" ({amount}, modified {when})"
    except OSError:
        tail = ""
    return f"{path.name}: {what}{tail}"


_JSON_KINDS = {"latticeread-calibration": ("calibration", "a calibration"),
               "latticeread-camera": ("camera", "a camera model"),
               "latticeread-session": ("session", "a saved session")}


def _inspect(path: Path) -> tuple[str, str]:
    try:
        with open(path, "rb") as fh:
            head = fh.read(512)
    except FileNotFoundError:
        return "missing", "no longer exists"
    except OSError as exc:
        return "file", f"a file that cannot be read ({exc.strerror or exc})"
    if head.startswith(b"\x89HDF\r\n\x1a\n"):
        return _inspect_hdf5(path)
    if head[:4] in (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+"):
        return "tiff", "a TIFF image file"
    if head.startswith(b"\x89PNG"):
        return "png", "a PNG image"
    if b"<svg" in head:
        return "svg", "an SVG drawing"
    if head.lstrip().startswith(b"{"):
        return _inspect_json(path)
    if b"," in head.split(b"\n", 1)[0]:
        return "csv", "a table (CSV)"
    return "file", "a file"


def _inspect_json(path: Path) -> tuple[str, str]:
    import json

    try:
        if path.stat().st_size > 64 * 2**20:
            return "json", "a JSON file"
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError, RecursionError):
        return "json", "a JSON file"
    fmt = doc.get("format") if isinstance(doc, dict) else None
    if fmt in _JSON_KINDS:
        return _JSON_KINDS[fmt]
    if isinstance(doc, dict) and "geometry" in doc:
        return "calibration", "a calibration"
    return "json", "a JSON file"


def _inspect_hdf5(path: Path) -> tuple[str, str]:
    try:
        import h5py

        with h5py.File(path, "r", locking=False) as f:
            fmt = str(f.attrs.get("format", ""))
            if fmt == "latticeread-run":
                n = int(f["committed"][0]) if "committed" in f else int(f.attrs.get("n_shots", 0))
                return "run", f"a run file with {n} frame{'s' if n != 1 else ''}"
            if fmt == "latticeread-session":
                return "session-results", "the results of a saved session"
            if fmt.startswith("latticeread-observables"):
                return "observables", "an observables file"
            return "hdf5", "an HDF5 file"
    except Exception:  # noqa: BLE001 - any unreadable file is described, not raised
        return "hdf5", "an HDF5 file (its header cannot be read now)"


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
