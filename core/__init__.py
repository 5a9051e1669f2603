"""Boscage core: event files, compensation, transforms, the additive tree
density and the analysis pipeline.  No Qt here: everything is usable from a
script or a notebook.

Research use only: nothing Boscage computes is a clinical diagnosis.
"""

import os as _os

# OpenMP threads that spin while waiting make numba's parallel loops (density
# engine, logicle) hundreds of times slower on a busy machine; waiting passively
# costs microseconds per parallel region.  This must be set before the first
# parallel kernel loads the OpenMP runtime, hence here; a user's setting wins.
_os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

__version__ = "0.1.0"

#: The caution carried by the app, the README and every export.
RESEARCH_USE_NOTE = (
    "For research use only. Not a clinical diagnosis and not for use in "
    "diagnostic procedures."
)

SOFTWARE_NAME = "Boscage"
