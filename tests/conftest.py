"""Shared test settings: every test makes its own generator; files only under tmp_path."""

from __future__ import annotations

import os

import matplotlib

# Figures are drawn off-screen; no display exists on CI machines.
matplotlib.use("Agg")
os.environ.setdefault("MPLBACKEND", "Agg")
