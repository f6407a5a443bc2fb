"""One question before the window replaces an existing file; never over the session's inputs.

Every save of the window (session, per-site table and its companion JSON, occupation
matrices, calibration, plot images, observables plots) goes through :func:`confirm_write`
with *all* the files it is about to write:

- an output that is one of the session's inputs (the open frame stack, the loaded
  calibration file, the run file a live watch is writing) is refused with an error box;
  nothing is written;
- an output that is an existing folder is refused the same way;
- when some outputs exist, one question lists each of them with what it holds ("run.h5: a
  run file with 176 frames (1.2 MB, modified ...)"); the save runs only after "Replace",
  and "Cancel" (the default button) writes nothing;
- otherwise the save runs at once.

The file dialogs of the window are opened with Qt's own overwrite question turned off
(:data:`SAVE_DIALOG_OPTIONS`): Qt asks only about the one name typed, without saying what
the file holds, and not about companion files written beside it (``x.csv.json``, the
``.h5`` results of a session), so this module asks instead, once, about all of them.
Files listed in ``agreed`` (the session's own files on a plain "Save") are replaced
without a question.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable, Mapping
from pathlib import Path

from PySide6 import QtCore, QtWidgets

from latticeread.io.outputs import describe_existing, outputs_to_replace, same_file

__all__ = ["SAVE_DIALOG_OPTIONS", "confirm_write", "ask_replace", "refused_input"]

#: Options of every save dialog of the window: no overwrite question of Qt's own (this module
#: asks, naming what each file holds and the companion files).
SAVE_DIALOG_OPTIONS = QtWidgets.QFileDialog.Option.DontConfirmOverwrite


def ask_replace(parent, title: str, text: str, on_answer: Callable[[bool], None]) -> QtWidgets.QMessageBox:
    """Non-blocking question "Replace" / "Cancel" (Cancel is the default); ``on_answer(bool)``."""
    box = QtWidgets.QMessageBox(QtWidgets.QMessageBox.Warning, title, text, QtWidgets.QMessageBox.NoButton, parent)
    box.setObjectName("latticeread_replace")
    replace = box.addButton("Replace", QtWidgets.QMessageBox.DestructiveRole)
    cancel = box.addButton(QtWidgets.QMessageBox.Cancel)
    box.setDefaultButton(cancel)
    box.setEscapeButton(cancel)
    box.setWindowModality(QtCore.Qt.WindowModal)
    box.setAttribute(QtCore.Qt.WA_DeleteOnClose, True)
    box.finished.connect(lambda _code: on_answer(box.clickedButton() is replace))
    box.open()
    return box


def refused_input(outputs: Iterable, inputs: Mapping[str, object]) -> str | None:
    """The message refusing an output that is one of ``inputs`` (role -> path), or None."""
    for out in outputs:
        if out is None:
            continue
        for role, source in inputs.items():
            if source and same_file(out, source):
                return (f"{Path(os.fspath(out)).name} is {role}; the window never writes over its own inputs. "
                        "Choose another file name.")
    return None


def confirm_write(parent, outputs: Iterable, *, inputs: Mapping[str, object] | None = None,
                  agreed: Iterable = (), then: Callable[[], object], title: str = "Save",
                  on_refused: Callable[[str], None] | None = None) -> bool | None:
    """Run ``then()`` once it is safe to write ``outputs``; ask before replacing existing files.

    Parameters
    ----------
    parent : QWidget
        Parent of the boxes.
    outputs : iterable of path
        Every file the save writes (main file and companions).
    inputs : mapping of str -> path, optional
        The session's inputs, by description ("the frame stack open in this session").
    agreed : iterable of path
        Outputs the user already agreed to replace (replaced without a question).
    then : callable
        The save itself.
    title : str
        What is being saved, for the boxes' titles.
    on_refused : callable, optional
        ``on_refused(message)`` instead of the error box (the window's error report).

    Returns
    -------
    bool or None
        True when ``then`` ran at once, False when the save was refused, None when the
        question is open (``then`` runs if the user answers "Replace").
    """
    from latticeread.errors import OutputExistsError
    from latticeread.gui import dialogs

    outputs = [Path(os.fspath(p)) for p in outputs if p is not None]

    def refuse(message: str) -> bool:
        if on_refused is not None:
            on_refused(message)
        else:
            dialogs.show_error(parent, f"{title}: not saved", message)
        return False

    message = refused_input(outputs, dict(inputs or {}))
    if message:
        return refuse(message)
    try:
        existing = outputs_to_replace(outputs)
    except OutputExistsError as exc:
        return refuse(str(exc))
    agreed = [Path(os.fspath(p)) for p in agreed]
    ask = [p for p in existing if not any(same_file(p, a) for a in agreed)]
    if not ask:
        then()
        return True
    lines = "\n".join(f"• {describe_existing(p)}" for p in ask)
    folder = ask[0].parent
    one = len(ask) == 1
    text = (f"{'This file exists' if one else 'These files exist'} in {folder}:\n\n{lines}\n\n"
            f"Replace {'it' if one else 'them'}? {'Its' if one else 'Their'} content will be lost.")
    ask_replace(parent, f"{title}: replace existing file{'' if one else 's'}?", text,
                lambda yes: then() if yes else None)
    return None
