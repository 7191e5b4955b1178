"""Shared test set-up: a private cache folder and headless matplotlib."""

from __future__ import annotations

import os
import tempfile

os.environ.setdefault("MPLBACKEND", "Agg")
os.environ.setdefault("TBMINV_CACHE_DIR", tempfile.mkdtemp(prefix="tbminv-test-cache-"))
