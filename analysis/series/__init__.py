"""Energy series: energies per frame, beam tracking, integrated intensities, I(V) curves.

The code is being split into one module per family; this package re-exports the
public names, so ``from analysis.series import track_series`` keeps working.
"""

from ..cli import add_iv_parser  # the `recinet iv` parser lives with the other commands
from .beams import BeamSet, beam_label, beams_from_nets, symmetry_ops
from .curves import BeamGroup, average_equivalent, smooth_curve
from .energies import (
    DEFAULT_NAME_PATTERN,
    EnergyTable,
    check_energies,
    energies_from_names,
    energies_from_start_step,
    read_energy_file,
)
from .export import csv_text, iv_table, result_to_dict, write_csv, write_json
from .geometry import SeriesCalibration, fit_series_geometry
from .integrate import (
    BLOCKING_FLAGS,
    FLAG_CROWDED,
    FLAG_MASKED,
    FLAG_NAMES,
    FLAG_NOT_REFINED,
    FLAG_OFF_SCREEN,
    FLAG_SATURATED,
    SpotIntegrals,
    integrate_spots,
)
from .track import (
    IVResult,
    SeriesIndexing,
    _index_frame_choice,  # noqa: F401
    index_series_frame,
    index_series_frames,
    track_series,
    vote_frame_choices,
)

__all__ = [
    "EnergyTable",
    "read_energy_file",
    "energies_from_names",
    "energies_from_start_step",
    "check_energies",
    "DEFAULT_NAME_PATTERN",
    "BeamSet",
    "beam_label",
    "beams_from_nets",
    "symmetry_ops",
    "SpotIntegrals",
    "integrate_spots",
    "SeriesCalibration",
    "fit_series_geometry",
    "IVResult",
    "track_series",
    "BeamGroup",
    "average_equivalent",
    "smooth_curve",
    "iv_table",
    "csv_text",
    "write_csv",
    "result_to_dict",
    "write_json",
    "add_iv_parser",
    "SeriesIndexing",
    "index_series_frame",
    "index_series_frames",
    "vote_frame_choices",
    "FLAG_OFF_SCREEN",
    "FLAG_MASKED",
    "FLAG_SATURATED",
    "FLAG_CROWDED",
    "FLAG_NOT_REFINED",
    "FLAG_NAMES",
    "BLOCKING_FLAGS",
]
