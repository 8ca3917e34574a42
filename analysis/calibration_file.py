"""Camera calibration files: a fitted screen geometry kept for later images.

:class:`Calibration` holds a :class:`~analysis.optics.ScreenGeometry` with its
uncertainties and how it was measured, and reads and writes it as
schema-versioned JSON (``recinet calibrate`` writes it, ``recinet analyze
--calibration`` reads it). :mod:`analysis.calibration` re-exports every name.

Positions are (x, y) pixels (x right, y down, the centre of the top-left pixel
at (0, 0)); momenta are crystallographic, Å⁻¹ without 2π.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from .errors import ParameterError
from .files import write_text_atomic
from .optics import H2_OVER_2ME_EV_A2, ScreenGeometry, wavelength_A

if TYPE_CHECKING:
    from .calibration import GeometryFit

__all__ = ["Calibration", "CALIBRATION_SCHEMA", "CALIBRATION_VERSION"]

CALIBRATION_SCHEMA = "recinet.calibration"
CALIBRATION_VERSION = 1


@dataclass(frozen=True, eq=False)
class Calibration:
    """A fitted screen geometry, reusable for later images from the same optics.

    Attributes
    ----------
    geometry : ScreenGeometry
    uncertainty : dict of str to float
        1-σ of each geometry field (see :data:`analysis.calibration.GEOMETRY_PARAMETERS`).
    energies_eV : tuple of float
        Energies of the calibration spots.
    n_spots : int
    rms_px : float
        RMS residual of the fit per coordinate.
    image_shape : (rows, cols) or None
    substrate : str
        Label of the reference surface, if any.
    note : str
    created : str
        ISO 8601 UTC time stamp.
    distortion_measured : bool
        False when the distortion R/L was held at its start value (the
        reference showed one ring of beams, i.e. one exit angle): the scale
        then holds at that angle only. Files without the field read as True.
    n_rings : int
        Distinct beam lengths |g| among the calibration spots (0: not known).
    covariance : (7, 7) ndarray or None
        Covariance of the fit's internal parameters (centre x, y, mean scale, distortion,
        rotation, ellipticity e1, e2): the σ of lattice constants measured through this
        calibration keeps their correlations (None in files written without it).

    Examples
    --------
    >>> cal = Calibration(ScreenGeometry(512.0, 500.0, 600.0, distortion=0.2), distortion_measured=False)
    >>> back = Calibration.from_dict(cal.to_dict())
    >>> print(back.geometry.scale_px, back.distortion_measured)
    600.0 False
    """

    geometry: ScreenGeometry
    uncertainty: dict = field(default_factory=dict)
    energies_eV: tuple = ()
    n_spots: int = 0
    rms_px: float = float("nan")
    image_shape: tuple | None = None
    substrate: str = ""
    note: str = ""
    created: str = ""
    distortion_measured: bool = True
    n_rings: int = 0
    covariance: np.ndarray | None = None

    @classmethod
    def from_fit(cls, fit: GeometryFit, **meta) -> "Calibration":
        """Calibration from a :class:`~analysis.calibration.GeometryFit` (extra fields as keywords).

        `distortion_measured` follows the fit (whether the distortion was among
        its free parameters) unless given.

        Parameters
        ----------
        fit : GeometryFit
            The fitted camera model.
        **meta
            Further fields (``substrate``, ``note``, ``image_shape``...).

        Returns
        -------
        Calibration
            The calibration.
        """
        meta.setdefault("created", _dt.datetime.now(_dt.timezone.utc).replace(microsecond=0).isoformat())
        meta.setdefault("distortion_measured", "distortion" in fit.free)
        cov = np.asarray(fit.covariance, dtype=np.float64)
        meta.setdefault("covariance", cov if cov.shape == (7, 7) else None)
        return cls(geometry=fit.geometry, uncertainty=dict(fit.uncertainty), energies_eV=tuple(fit.energies_eV),
                   n_spots=fit.n_spots, rms_px=float(fit.rms_px), **meta)

    @property
    def scale_px_sqrt_eV(self) -> float:
        """Image distance per unit parallel momentum times √E near the centre:
        r ≈ this × |k| / √E (px · √eV · Å), since λ = √(h²/2mₑe / E)."""
        return float(self.geometry.scale_px * math.sqrt(H2_OVER_2ME_EV_A2))

    def pixels_per_inv_A(self, energy_eV: float) -> float:
        """Image pixels per Å⁻¹ (no 2π) near the centre at `energy_eV`.

        Parameters
        ----------
        energy_eV : float
            Electron energy, eV.

        Returns
        -------
        float
            Pixels per Å⁻¹.
        """
        return float(self.geometry.scale_px * wavelength_A(energy_eV))

    def to_dict(self) -> dict:
        """The calibration as plain JSON types (what :meth:`from_dict` reads).

        Returns
        -------
        dict
            Schema and version, the camera model, its uncertainties and the facts of the fit.
        """

        def num(v):
            return None if v is None or (isinstance(v, float) and not math.isfinite(v)) else float(v)

        return {
            "schema": CALIBRATION_SCHEMA,
            "version": CALIBRATION_VERSION,
            "geometry": self.geometry.to_dict(),
            "uncertainty": {k: num(v) for k, v in self.uncertainty.items()},
            "covariance": None if self.covariance is None else [[num(v) for v in row] for row in
                                                                 np.asarray(self.covariance).tolist()],
            "distortion_measured": bool(self.distortion_measured),
            "n_rings": int(self.n_rings),
            "energies_eV": [float(v) for v in self.energies_eV],
            "n_spots": int(self.n_spots),
            "rms_px": num(self.rms_px),
            "image_shape": None if self.image_shape is None else [int(v) for v in self.image_shape],
            "substrate": self.substrate,
            "note": self.note,
            "created": self.created,
            "pixel_convention": "x right, y down, centre of the top-left pixel at (0, 0)",
            "momentum_convention": "crystallographic, 1/Å without 2π",
        }

    @classmethod
    def from_dict(cls, d, *, source: str = "calibration") -> "Calibration":
        """Inverse of :meth:`to_dict`; raises ParameterError naming what is wrong.

        Parameters
        ----------
        d : dict
            What :meth:`to_dict` wrote (read back from JSON).
        source : str, keyword-only
            What the messages call it (e.g. the file's name).

        Returns
        -------
        Calibration
            The calibration.
        """
        if not isinstance(d, dict):
            raise ParameterError(f"{source}: expected a JSON object, got {type(d).__name__}.")
        if d.get("schema") != CALIBRATION_SCHEMA:
            raise ParameterError(f"{source}: not a recinet calibration (schema {d.get('schema')!r}, "
                                 f"expected {CALIBRATION_SCHEMA!r}).")
        ver = d.get("version")
        if not isinstance(ver, int) or ver < 1:
            raise ParameterError(f"{source}: bad calibration version {ver!r}.")
        if ver > CALIBRATION_VERSION:
            raise ParameterError(f"{source}: calibration version {ver} is newer than this program "
                                 f"(reads up to {CALIBRATION_VERSION}); update recinet.")
        if "geometry" not in d or not isinstance(d["geometry"], dict):
            raise ParameterError(f"{source}: the 'geometry' object is missing.")
        g = d["geometry"]
        missing = {"center_x_px", "center_y_px", "scale_px"} - set(g)
        if missing:
            raise ParameterError(f"{source}: geometry lacks {sorted(missing)}.")
        try:
            geom = ScreenGeometry.from_dict(g)
        except (TypeError, ValueError) as exc:
            raise ParameterError(f"{source}: invalid geometry ({exc}).") from None
        measured = d.get("distortion_measured", True)
        if not isinstance(measured, bool):
            raise ParameterError(f"{source}: 'distortion_measured' must be true or false, got {measured!r}.")
        try:
            unc = {str(k): (float("nan") if v is None else float(v)) for k, v in (d.get("uncertainty") or {}).items()}
            shape = d.get("image_shape")
            return cls(geometry=geom, uncertainty=unc,
                       energies_eV=tuple(float(v) for v in d.get("energies_eV", ())),
                       n_spots=int(d.get("n_spots", 0)),
                       rms_px=float("nan") if d.get("rms_px") is None else float(d["rms_px"]),
                       image_shape=None if shape is None else tuple(int(v) for v in shape),
                       substrate=str(d.get("substrate", "")), note=str(d.get("note", "")),
                       created=str(d.get("created", "")), distortion_measured=measured,
                       n_rings=int(d.get("n_rings", 0)), covariance=_covariance(d.get("covariance")))
        except (TypeError, ValueError) as exc:
            raise ParameterError(f"{source}: invalid calibration field ({exc}).") from None

    def save_json(self, path) -> Path:
        """Write the calibration as indented JSON, whole or not at all; returns the path.

        Parameters
        ----------
        path : str or os.PathLike
            The file to write; its folder must exist.

        Returns
        -------
        pathlib.Path
            `path`.
        """
        text = json.dumps(self.to_dict(), indent=2, allow_nan=False, ensure_ascii=False)
        return write_text_atomic(path, text + "\n")

    @classmethod
    def load_json(cls, path) -> "Calibration":
        """Read a file written by :meth:`save_json`.

        Parameters
        ----------
        path : str or os.PathLike
            The file.

        Returns
        -------
        Calibration
            The calibration.

        Raises
        ------
        ParameterError
            Missing file, not JSON, another schema, a newer version, or bad fields.
        """
        p = Path(path)
        if not p.is_file():
            raise ParameterError(f"{p.name}: calibration file not found ({p}).")
        if p.stat().st_size > 10_000_000:
            raise ParameterError(f"{p.name}: too large for a calibration file.")
        try:
            d = json.loads(p.read_text(encoding="utf-8"))
        except (UnicodeDecodeError, json.JSONDecodeError) as exc:
            raise ParameterError(f"{p.name}: not a JSON calibration file ({exc.__class__.__name__}: "
                                 f"{str(exc).splitlines()[0]}).") from None
        return cls.from_dict(d, source=p.name)


def _covariance(value) -> np.ndarray | None:
    """The calibration file's 7×7 covariance, or None (absent, or not a finite 7×7 table)."""
    if value is None:
        return None
    cov = np.array([[float("nan") if v is None else float(v) for v in row] for row in value], dtype=np.float64)
    if cov.shape != (7, 7):
        raise ValueError(f"covariance must be 7×7, got {cov.shape[0]}×{cov.shape[1] if cov.ndim > 1 else 0}")
    return cov if np.all(np.isfinite(cov)) else None
