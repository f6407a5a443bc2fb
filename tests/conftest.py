"""Shared pytest set-up: Qt renders offscreen (no display needed); set before Qt starts."""

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")

#: Test files that take the longest (seconds of one worker on an idle 2-core machine, measured
#: with `--durations`), longest first. The two pytest-xdist workers take whole files in
#: collection order (`--dist loadfile --no-loadscope-reorder` in pyproject.toml): starting with
#: the longest files and ending with the many short ones keeps both workers busy to the end,
#: instead of one worker finishing a 40 s file alone while the other idles.
LONGEST_FIRST = (
    "test_reference_frames.py",       # ~40 s: three cases run unaided
    "test_reference_frames_more.py",  # ~35 s
    "test_lattice_model.py",          # ~32 s
    "test_fidelity.py",               # ~26 s
    "test_faults_batch.py",           # ~25 s
    "test_batch.py",                  # ~22 s
    "test_psf_width.py",              # ~22 s
    "test_cli_lattice_prior.py",      # ~20 s
    "test_lattice_model_prior.py",    # ~19 s
    "test_faults_run_file.py",        # ~16 s
    "test_artefacts.py",              # ~15 s
    "test_atoms.py",                  # ~14 s
    "test_x11_smoke.py",              # ~12 s where Xvfb is installed
)


def pytest_collection_modifyitems(session, config, items):
    """Longest files first (see :data:`LONGEST_FIRST`); every other file keeps its place."""
    rank = {name: i for i, name in enumerate(LONGEST_FIRST)}
    order = {id(item): k for k, item in enumerate(items)}
    items.sort(key=lambda item: (rank.get(item.path.name, len(rank)), order[id(item)]))
