"""Imported first by the batch's forkserver process: it dies with the run that started it.

The forkserver forks the pool's worker processes; with the parent-death signal set here
(:func:`latticeread.runs.stopping.die_with_parent`) it ends at once when the run is
killed, and the workers, whose parent it is, follow through their own parent-death signal.
"""

from latticeread.runs.stopping import die_with_parent

die_with_parent()
