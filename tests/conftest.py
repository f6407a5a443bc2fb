"""Shared pytest set-up: Qt renders offscreen (no display needed); set before Qt starts."""

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
