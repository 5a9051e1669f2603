"""Shared test fixtures.  GUI tests run offscreen."""

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
