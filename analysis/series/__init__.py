"""Energy series: energies per frame, beam tracking, integrated intensities, I(V) curves.

The code lives in :mod:`analysis.series.track` while it is split into one module per
family; this package re-exports its public names.
"""

from .track import *  # noqa: F401,F403
from .track import __all__, _index_frame_choice  # noqa: F401
