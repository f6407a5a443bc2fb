"""One check of the ``format`` / ``format_version`` stamp every latticeread file carries.

Calibration, session, run and results files each say what they are (``format``) and which
version of its layout they follow (``format_version``, a whole number). A reader calls
:func:`check_format_version` before it reads anything else: a file of another kind, a
version this program does not know (newer, or not a whole number) is refused with a message
instead of being half-understood.
"""

from __future__ import annotations

from collections.abc import Iterable

__all__ = ["check_format_version"]


def check_format_version(found_format, found_version, *, expected_format: str, versions: Iterable[int],
                         where: str, error=ValueError, default_version: int | None = None) -> int:
    """Return the file's layout version, or raise ``error`` naming what is wrong.

    Parameters
    ----------
    found_format : str or bytes or None
        The ``format`` stamp read from the file.
    found_version : int, float, str, bytes or None
        The ``format_version`` stamp read from the file.
    expected_format : str
        The stamp this reader understands (``"latticeread-session"``...).
    versions : iterable of int
        The layout versions this reader understands.
    where : str
        The file, for the message.
    error : exception class
        What to raise (e.g. :class:`~latticeread.errors.CalibrationError`).
    default_version : int, optional
        Version assumed when the file has no ``format_version`` (old files); without it a
        missing version is refused.

    Raises
    ------
    error
        Another kind of file, a missing or malformed version, or an unknown version.
    """
    if isinstance(found_format, bytes):
        found_format = found_format.decode("utf-8", "replace")
    if found_format != expected_format:
        raise error(f"{where} is not a {expected_format} file (its format stamp is {found_format!r})")
    known = sorted(int(v) for v in versions)
    if found_version is None and default_version is not None:
        return int(default_version)
    if isinstance(found_version, bytes):
        found_version = found_version.decode("utf-8", "replace")
    try:
        version = int(found_version)
        whole = not isinstance(found_version, bool) and float(found_version) == version
    except (TypeError, ValueError, OverflowError):
        whole = False
    if not whole:
        raise error(f"{where} has format_version {found_version!r}; expected a whole number "
                    f"({', '.join(map(str, known))})")
    if version not in known:
        newer = version > max(known)
        hint = ("it was written by a newer latticeread: update latticeread to read it" if newer
                else "this program reads only versions " + ", ".join(map(str, known)))
        raise error(f"{where} has format_version {version}, which this program does not know; {hint}")
    return version
