"""``latticeread gui [FILE]``: open the desktop program (the default command)."""

from __future__ import annotations

import argparse


def add_parser(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("files", nargs="*", metavar="FILE",
                        help="frame file (TIFF, HDF5, .npy/.npz) or saved session (.json) to open")
    parser.add_argument("--settings", metavar="INI", default=None,
                        help="use this settings file instead of the user's (window layout, recent files)")
    parser.add_argument("--no-restore", action="store_true",
                        help="do not offer to restore an automatically saved session")


def run(args) -> int:
    from latticeread.gui.app import run_gui

    return run_gui(args.files, settings_path=args.settings, restore=not args.no_restore)
