"""Boscage core: event files, compensation, transforms, the additive tree
density and the analysis pipeline.  No Qt here: everything is usable from a
script or a notebook.

Research use only: nothing Boscage computes is a clinical diagnosis.
"""

__version__ = "0.1.0"

#: The caution carried by the app, the README and every export.
RESEARCH_USE_NOTE = (
    "For research use only. Not a clinical diagnosis and not for use in "
    "diagnostic procedures."
)

SOFTWARE_NAME = "Boscage"
