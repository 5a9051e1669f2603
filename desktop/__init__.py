"""Boscage desktop application (PySide6 + pyqtgraph).  Calls :mod:`core` for all science."""
