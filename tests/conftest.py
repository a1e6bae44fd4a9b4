"""Test configuration shared by the whole suite."""

import os

# Qt must never look for a display in tests (QT.md): set before any Qt import.
os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
os.environ.setdefault("MPLBACKEND", "Agg")
