"""Energy series: energies per frame, beam tracking, integrated intensities, I(V) curves.

A LEED energy series is a stack of camera frames recorded while the electron energy
steps. Every beam moves radially about the pattern centre: at normal incidence it leaves
at sin θ = λ |g| with λ = √(150.4 / E) Å, so on a distant camera its radius falls as
1/√E. One module per family; this package re-exports the public names:

``energies``
    The energy of each frame (CSV or JSON sidecar, a number in each file name, or a
    start and a step) and its checks (:func:`read_energy_file`,
    :func:`energies_from_names`, :func:`energies_from_start_step`, :func:`check_energies`).
``beams``
    The beams of a substrate plus overlayer domains with their symmetry-equivalence
    classes (:func:`beams_from_nets`, :class:`BeamSet`, :func:`symmetry_ops`).
``integrate``
    A spot's integrated intensity with a local background (annulus mean or a fitted
    plane) or by a profile fit, with saturation flags and a counting-statistics
    uncertainty (:func:`integrate_spots`); the flag bits (:data:`FLAG_NAMES`).
``index_frames``
    Indexing one frame of the series (the camera model, the substrate net and the
    overlayer domains it shows) with :func:`analysis.pipeline.analyze_image`
    (:func:`index_series_frame`), or several that vote (:func:`index_series_frames`,
    :func:`vote_frame_choices`).
``track``
    Every beam followed through the stack, frames streamed one at a time (a stack on
    disk is read a frame or two ahead on a second thread): predict from the current
    screen geometry, refine locally, integrate, and refit the geometry from all frames
    so far (:func:`track_series`, :class:`IVResult`).
``geometry``
    The screen geometry (centre, scale per √eV, distortion, rotation) fitted from all
    frames jointly, with uncertainties (:func:`fit_series_geometry`).
``curves``
    Smoothing, and symmetry-equivalent beams averaged with the Pendry and
    Zanazzi–Jona R-factors among them (:func:`smooth_curve`, :func:`average_equivalent`).
``export``
    The I(V) table as CSV and the whole record as JSON (:func:`iv_table`,
    :func:`write_csv`, :func:`write_json`).

The ``recinet iv`` command (:func:`add_iv_parser`) lives in :mod:`analysis.cli`.

Conventions: pixel arrays are (row, col) inside; positions at the API are (x, y) pixels
as in :mod:`analysis.optics` (x right, y down, the centre of the top-left pixel at
(0, 0)). Parallel momenta are Å⁻¹ without 2π. Intensities are in the frames' own units
(ADU) summed over pixels, divided by the beam current when one is given.
"""

from ..cli import add_iv_parser
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
from .index_frames import SeriesIndexing, index_series_frame, index_series_frames, vote_frame_choices
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
from .track import IVResult, track_series

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
