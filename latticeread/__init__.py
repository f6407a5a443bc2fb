"""latticeread: occupation matrices from site-resolved fluorescence images of lattice atoms.

The numerical core lives in :mod:`latticeread.core` (numpy/scipy only, no Qt, no file I/O),
file reading and writing in :mod:`latticeread.io`, the evented session model in
:mod:`latticeread.session` and the desktop program in :mod:`latticeread.gui`.
"""

__version__ = "0.1.0"

__all__ = ["__version__"]
