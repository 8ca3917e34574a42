"""Parameter series: one energy, a pattern followed while temperature, exposure or time changes.

One module per family; this package re-exports the public names:

``parameters``
    The parameter of each frame, with its name and unit: a CSV/JSON sidecar, a number in
    each file name, or the files' times (:class:`ParameterTable`, :func:`read_parameter_file`,
    :func:`parameters_from_names`, :func:`parameters_from_times`).
``trace``
    Every beam followed frame by frame at one energy: integrated intensity, local
    background, radial and tangential widths, position, and the camera's slow drift
    (:class:`BeamFollower`, :class:`ParameterTrace`, :func:`fit_drift`).
``segments``
    Fractional beams grouped into families, their presence per frame, and the segments
    where the set of families stays the same (:func:`beam_families`,
    :func:`family_presence`, :func:`find_segments`).
``transition``
    The order–disorder form I ∝ (1 − T/Tc)^(2β) + background fitted to a beam's
    intensity, with Tc and its uncertainty (:func:`fit_order_disorder`).
``run``
    A whole series (:func:`analyse_parameter_series`) or one frame at a time as the
    files arrive (:class:`LiveSeries`); segments indexed on their own.
``export``
    CSV (one row per frame and beam, appendable) and the JSON record.

Positions are (x, y) pixels; indices are in the substrate's reciprocal basis.
"""

from .export import CSV_COLUMNS, csv_text, frame_rows, result_to_dict, write_csv, write_json
from .parameters import (
    DEFAULT_PARAMETER_PATTERN,
    ParameterTable,
    check_parameters,
    parameters_from_names,
    parameters_from_times,
    read_parameter_file,
    split_heading,
)
from .run import LiveSeries, ParameterSeriesResult, analyse_parameter_series, resolve_parameters
from .segments import Family, Segment, beam_families, family_presence, find_segments, orbit_hk, snap_fractional
from .trace import BeamFollower, ParameterTrace, fit_drift
from .transition import OrderDisorderFit, fit_order_disorder

__all__ = [
    "ParameterTable", "DEFAULT_PARAMETER_PATTERN", "split_heading", "read_parameter_file", "parameters_from_names",
    "parameters_from_times", "check_parameters",
    "BeamFollower", "ParameterTrace", "fit_drift",
    "Family", "Segment", "beam_families", "family_presence", "find_segments", "orbit_hk", "snap_fractional",
    "OrderDisorderFit", "fit_order_disorder",
    "LiveSeries", "ParameterSeriesResult", "analyse_parameter_series", "resolve_parameters",
    "CSV_COLUMNS", "frame_rows", "csv_text", "result_to_dict", "write_csv", "write_json",
]
