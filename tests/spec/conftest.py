"""Puts this folder on sys.path so that spec files can name ``objectives_for_tests:...``."""

from __future__ import annotations

import sys
from pathlib import Path

HERE = str(Path(__file__).resolve().parent)
if HERE not in sys.path:
    sys.path.insert(0, HERE)
