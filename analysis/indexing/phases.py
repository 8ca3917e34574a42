"""Coexisting phases: a second (third) overlayer for the fractional spots the best one
leaves unexplained, kept only when it explains them significantly; and the plane
group each phase's absences allow (:mod:`.absences`).

The search for a further phase runs :func:`.overlayers.find_overlayers` again with the
spots of the phases found so far counted like substrate beams: they neither count for
nor against the new phase, and a beam of the new phase that falls on one of them is
not absent. A further phase must

* be rational (commensurate or coincidence): satellites of an incommensurate layer
  are not a phase;
* explain at least :data:`MIN_PHASE_SPOTS` trusted spots, and at least half of the
  trusted fractional spots still unexplained;
* beat the bare substrate of that search (every remaining spot unexplained) by at
  least :data:`MIN_PHASE_GAIN` in the overlayer score (stray spots rarely form a net
  whose beams are all present).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

from ..errors import FitError
from .absences import PlaneGroupReading, read_plane_group
from .overlayers import OverlayerModel, _context, evaluate_model, find_overlayers

__all__ = ["Phase", "find_phases", "MIN_PHASE_SPOTS", "MIN_PHASE_GAIN"]

MIN_PHASE_SPOTS = 4
"""Fewest trusted spots a further phase must explain."""

MIN_PHASE_GAIN = 3.0
"""Least score a further phase must gain over leaving its spots unexplained."""

PHASE_PENALTY = 1.0
"""What each further phase costs in the joint score (like a further domain)."""

SWITCH_MARGIN = 1.0
"""How much a set of phases led by another model must beat the best model's set."""

_MAX_PHASES = 3
_STARTS = 3
_POOL = 20  # models listed by the wider search for starts
_MISSING_SHARE = 0.15  # absent beams per explained spot above which a compromise cell is suspected
_RATIONAL = ("commensurate", "coincidence")


@dataclass(frozen=True, eq=False)
class Phase:
    """One overlayer phase of the surface.

    Attributes
    ----------
    model : OverlayerModel
        Its model (``explained_by`` over all spots: −2 for substrate beams and the
        spots of earlier phases).
    spots : (N,) ndarray of int64
        Indices of the spots this phase explains.
    intensity_share : float or None
        Its spots' share of the intensity of all the phases' spots (None without intensities).
    plane_group : PlaneGroupReading
        What its absences say about its plane group.
    """

    model: OverlayerModel
    spots: np.ndarray
    intensity_share: float | None
    plane_group: PlaneGroupReading

    def to_dict(self) -> dict:
        """The phase as the JSON's ``overlayer.phases`` entries write it.

        Returns
        -------
        dict
            Plain JSON types.
        """
        m = self.model
        return {"kind": m.kind, "matrix": np.asarray(m.matrix, float).tolist(),
                "domains": [np.asarray(d, float).tolist() for d in m.domains], "n_domains": m.n_domains,
                "wood": m.wood, "coverage": float(m.coverage), "intensity_share": self.intensity_share,
                "explained": int(len(self.spots)), "spots": [int(i) for i in self.spots],
                "plane_group": self.plane_group.to_dict()}


def _grow(p1: OverlayerModel, fit, kw: dict, rel: np.ndarray) -> tuple[list, float]:
    """Phases found after `p1` while significant, and the joint score of the set.

    The joint score is Σ over phases of (explained − penalties) − the spots left
    unexplained − :data:`PHASE_PENALTY` per further phase: ``p1.score`` plus, for
    each further phase, its score in its own search plus the spots that search
    started with (which ``p1.score`` already counted as unexplained).
    """
    hk, integer = fit.hk, np.asarray(fit.integer, bool)
    chain, joint = [p1], float(p1.score)
    taken = p1.explained_by >= 0
    while len(chain) < _MAX_PHASES:
        n_left = int((~integer & ~taken & rel).sum())
        if n_left < MIN_PHASE_SPOTS:
            break
        try:
            cand = find_overlayers(hk, integer | taken, fit, n_results=_POOL // 2, **kw)
        except FitError:  # a net too fine to enumerate: no further phase
            break
        top = next((m for m in cand if m.kind in _RATIONAL), None)
        if top is None:
            break
        mine = top.explained_by >= 0
        n_mine = int((mine & rel).sum())
        gain = float(top.score) + n_left
        if n_mine < MIN_PHASE_SPOTS or n_mine < 0.5 * n_left or gain < MIN_PHASE_GAIN:
            break
        if any(_same_net(top, f) for f in chain):
            break
        chain.append(top)
        joint += gain - PHASE_PENALTY
        taken = taken | mine
    return chain, joint


def find_phases(fit, models: list, *, energy_eV: float, intensity=None, valid_mask=None, tol_px: float = 2.5,
                reliable=None) -> tuple[list, tuple]:
    """The phases of a pattern, dominant first, and the models with the dominant phase first.

    The best model starts a set of phases (:func:`_grow`). Two phases side by side can
    make a compromise cell, whose beams cover both, score best alone; so when the best
    model leaves spots unexplained, or misses beams (more than 15 % of the spots it
    explains), rational cells that explain part of the spots cleanly (ranked by their
    score without the spots they leave, from a wider search) start sets too, unless
    even a perfect further phase could not lift them over the best set. A set led by
    another model is kept when it beats the best set by more than :data:`SWITCH_MARGIN`. The
    phases are ordered by their share of the fractional intensity (by spots explained
    without intensities); the dominant one, evaluated on every spot, leads the models.

    Parameters
    ----------
    fit : SubstrateFit
        The substrate reading the models were found on.
    models : list of OverlayerModel
        The overlayer models, best first (:func:`.overlayers.find_overlayers`).
    energy_eV : float
        Electron energy, eV.
    intensity : (K,) ndarray of float, optional
        Spot intensities (the intensity shares and the search use them).
    valid_mask : (M, N) ndarray of bool, optional
        Pixels where a spot could be seen.
    tol_px : float
        Matching tolerance, pixels.
    reliable : (K,) ndarray of bool, optional
        Spots whose centres are trusted (only they count in the scores).

    Returns
    -------
    models : list of OverlayerModel
        `models`, or the dominant phase's model first when a set of phases led by
        another model won.
    phases : tuple of Phase
        Empty for a clean surface (best model of kind ``none``).
    """
    best = models[0]
    if best.kind == "none":
        return models, ()
    hk, integer = fit.hk, np.asarray(fit.integer, bool)
    rel = np.ones(len(hk), bool) if reliable is None else np.asarray(reliable, bool).reshape(len(hk))
    kw = dict(energy_eV=energy_eV, intensity=intensity, valid_mask=valid_mask, tol_px=tol_px, reliable=reliable)
    # two phases side by side leave spots unexplained or beams absent for any one cell: then
    # rational cells that explain part of the spots cleanly may start a set of phases, ranked
    # by their score without the spots they leave (what they would score as one phase)
    pool = list(models[1:])
    # (a few beams of one cell missing is common: weak beams; a compromise cell misses many)
    if best.unexplained >= MIN_PHASE_SPOTS or best.absent >= max(MIN_PHASE_SPOTS, _MISSING_SHARE * best.explained):
        try:
            pool += find_overlayers(hk, integer, fit, n_results=_POOL, **kw)
        except FitError:
            pass
    starts = []
    for m in sorted((m for m in pool if m.kind in _RATIONAL), key=lambda m: -(m.score + m.score_terms["unexplained"])):
        if not _same_net(m, best) and not any(_same_net(m, o) for o in starts):
            starts.append(m)
    chain, joint = _grow(best, fit, kw, rel)
    for p1 in starts[: _STARTS - 1]:
        # each spot a further phase explains gains at most 2 (+1 explained, −1 no longer unexplained)
        if p1.score + 2 * p1.score_terms["unexplained"] - PHASE_PENALTY <= joint + SWITCH_MARGIN:
            continue
        c, j = _grow(p1, fit, kw, rel)
        if len(c) > 1 and j > joint + SWITCH_MARGIN:
            chain, joint = c, j
    spots = [np.flatnonzero(m.explained_by >= 0) for m in chain]
    if intensity is not None:
        inten = np.asarray(intensity, float)
        sums = np.array([float(inten[s].sum()) for s in spots])
        shares = list(sums / sums.sum()) if sums.sum() > 0 else [None] * len(chain)
        order = sorted(range(len(chain)), key=lambda i: -sums[i])
    else:
        shares = [None] * len(chain)
        order = sorted(range(len(chain)), key=lambda i: -len(spots[i]))
    lead = chain[order[0]]
    if lead is not best:  # the dominant phase, scored on every spot, leads the models
        if order[0] != 0:
            lead = evaluate_model(hk, integer, fit, lead.matrix, **kw)
        others = [m for m in models if not _same_net(m, lead)]
        names = ", ".join(c.wood or c.kind for i, c in enumerate(chain) if i != order[0])
        lead = dataclasses.replace(lead, notes=lead.notes + (f"coexists with {names}: together they explain "
                                                             f"the spots a single cell leaves",))
        models = [lead] + others
        chain = [lead if i == order[0] else c for i, c in enumerate(chain)]
    ctx = _context(hk, integer, fit, energy_eV, intensity, valid_mask, tol_px, reliable=reliable)
    phases = tuple(Phase(model=chain[i], spots=spots[i], intensity_share=None if shares[i] is None else
                         float(shares[i]), plane_group=read_plane_group(ctx, chain[i].domains)) for i in order)
    return models, phases


def _same_net(a: OverlayerModel, b: OverlayerModel) -> bool:
    """One domain of `a` spans the same lattice as one of `b`."""
    for x in a.domains:
        for y in b.domains:
            t = np.asarray(x, float) @ np.linalg.inv(np.asarray(y, float))
            if np.allclose(t, np.rint(t), atol=1e-6) and abs(abs(np.linalg.det(np.rint(t))) - 1) < 1e-6:
                return True
    return False
