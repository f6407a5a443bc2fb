"""One family of exceptions with messages a physicist can act on.

Every error the program raises on purpose derives from :class:`LatticeReadError`, so the
command line can print the message without a traceback and the GUI can show it in a dialog.
Each class also derives from the matching built-in (``ValueError``, ``OSError``) so that
generic code keeps working.

Exit codes of the command line (documented in the README):

====  ==========================================================
0     success
1     unexpected internal error (a bug: please report with --debug); never a deliberate refusal
2     bad command-line usage (unknown command or option, unsupported output suffix)
3     input data problem (unreadable file, bad frame, no lattice, frames too large for memory)
4     output problem (folder not writable, disk full, output exists without --force,
      output would replace one of the command's inputs)
5     calibration problem (missing keys, values outside physical ranges, wrong frame size or camera)
130   interrupted (Ctrl-C)
====  ==========================================================
"""

from __future__ import annotations


class LatticeReadError(Exception):
    """Base class of every error raised on purpose by latticeread.

    Raise one of the subclasses; the base class itself exits with 2 (usage), because a
    refusal raised on purpose is never an internal error (exit code 1 is kept for bugs).
    """

    exit_code = 2


class FrameError(LatticeReadError, ValueError):
    """A frame or stack is unusable: wrong shape, NaN, empty, unreadable."""

    exit_code = 3


class FrameFileError(FrameError):
    """A file holding frames cannot be read (missing, truncated, wrong format)."""


class LatticeNotFound(LatticeReadError, ValueError):
    """No lattice could be found in the image (empty frame, pure noise, one atom...)."""

    exit_code = 3


class CalibrationError(LatticeReadError, ValueError):
    """A calibration is incomplete, malformed or does not match the frames."""

    exit_code = 5


class ExportError(LatticeReadError, OSError):
    """An output file could not be written (read-only folder, disk full...)."""

    exit_code = 4


class ReconstructionError(LatticeReadError, ValueError):
    """Site amplitudes or occupations cannot be computed for this input."""

    exit_code = 3


class FidelityError(LatticeReadError, ValueError):
    """Occupation matrices or rates given to the fidelity estimate are unusable."""

    exit_code = 3


class UsageError(LatticeReadError, ValueError):
    """The command line asks for something the program does not do (e.g. an unsupported output suffix)."""

    exit_code = 2


class OutputExistsError(ExportError):
    """The output file exists and ``--force`` was not given, or it is one of the command's inputs."""


class LatticeReadWarning(UserWarning):
    """Legal but suspicious input or a result that can mislead (few atoms, poor fit)."""


class ClusterError(LatticeReadError, RuntimeError):
    """A Dask cluster cannot be used: Dask not installed, scheduler unreachable, no workers."""

    exit_code = 2
