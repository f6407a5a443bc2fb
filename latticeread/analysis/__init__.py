"""The one analysis path: frames + calibration in, per-frame results out, for every front end.

The window's session, ``calibrate``, ``reconstruct``, ``fidelity``, ``batch`` and ``watch``
all go through this package, so the same frames and calibration give the same occupation
matrices whichever front end ran them:

* :mod:`latticeread.analysis.service` -- opening frames under the calibration's frame policy
  (NaN/saturated pixels flag their sites everywhere), the threshold policy (fixed, pooled over
  a stack, per frame), per-frame results and the run-file records, and the calibration merge
  that keeps what the user gave (pixel size, optics, camera).
* :mod:`latticeread.analysis.executor` -- where frames are reconstructed: this process, a pool
  of worker processes with one BLAS thread each, or a Dask cluster; one worker cache of
  reconstructors keyed by the calibration.

It sits above :mod:`latticeread.core` and :mod:`latticeread.io` and below the session, the
runs and the commands; it never imports Qt.
"""

from latticeread.analysis.service import (
    FrameAnalyser,
    ShotFailure,
    analyse_stack,
    classify_records,
    merge_calibration,
    open_stack,
    shot_record,
)

__all__ = ["FrameAnalyser", "ShotFailure", "analyse_stack", "classify_records", "merge_calibration", "open_stack",
           "shot_record"]
