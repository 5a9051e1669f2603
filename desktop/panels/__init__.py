"""Side panels of the main window (Fit, Selections, Channels, Spillover, Tubes)."""
