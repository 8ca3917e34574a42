"""The two scores of the indexing, each a weighted sum of named terms held in one table.

Overlayer score (:data:`OVERLAYER_TERMS`; ranks the models for the fractional-order spots)::

    score = E − ¼·S − U − (D − 1) − ½·|log₂ det M| − K − mean((miss/tol)²) + tanh(ΔlogI) + 2·Q − 2·Y − ½·A − H + P

E     fractional spots the model explains; S of them only as multiple-scattering
      satellites (so a satellite-only spot counts ¾); U fractional spots left
      unexplained. E, S and U count the spots with trusted centres (not cut by a
      mask edge, fit converged), or every spot when fewer than two fractional
      spots are trusted.
D     domains used; M the matrix of the first.
miss  distance of each explained trusted spot to the nearest beam of its model
      (satellites included), in units of the matching tolerance.
ΔlogI median log intensity of the layer's own beams minus that of its
      satellite-only spots (0 without satellites or intensities).
Q, Y  for a layer that nearly coincides with the substrate (a moiré: its first-order beams
      within 0.2 |a*| of substrate beams), whose satellites h + n₁Δ₁ + n₂Δ₂ of up to the
      fourth order are allowed: every net of the moiré module then explains the same spots,
      so Q = tanh(ΔlogI) again (the layer's own beams outshine the satellites) and
      Y = 1 − D/D_sym, the share of the net's symmetry domains left out (a net of lower
      symmetry than the substrate's, seen in one domain, is one of the module's nets, not
      the layer). Both 0 for other layers.
A     predicted fractional beams absent where a spot could have been seen; for a rational
      model by symmetry class: Σ (1 + log₂ n) over the classes (orbits under the substrate's
      point group, all domains together) with n members absent (a class shares one
      intensity, so a dark class is one fact more than n); for a continuous fit one per beam.
K     log₂ q of a rational matrix with non-integer entries (a coincidence cell), q the common
      denominator of its entries (the same in every basis of the cell); 0 for integer and
      irrational matrices.
H     irrational handicap 1.5 + 0.05·E′ + 2·(D − 1) of an incommensurate model
      (E′: every spot explained, trusted or not): four free parameters can absorb a
      small camera error, and each further irrational domain is a new free orientation.
P     population gain D·tanh(max(ln r − ln 2, 0)) of a rational multi-domain model,
      r the variance ratio of the population test (symmetry-equivalent beams agree
      clearly better when each domain has its own population): it can win back the
      domain penalty where positions cannot tell two models apart.

The overlayer search ranks candidates by ``score − H`` for continuous fits
(satellites allowed) and, before A is counted, by the bound without ½·A; a model
typed by hand has H = P = 0.

Substrate score (:data:`SUBSTRATE_TERMS`; ranks the readings of the substrate)::

    score = 4·C + 2·X + tanh(ΔlogI) − ½·z² − rms/tol

C     completeness: predicted integer beams inside the seen region that were found.
X     indexable fraction: spots on integer or simple fractional (denominator ≤ 8) positions.
ΔlogI median log intensity of the integer spots minus the log of the 90th
      percentile of the others (0 when every spot is integer).
z     ln(scale / prior) / σ for the screen-size prior on the camera scale (0 without a prior).
rms   RMS of the fit's pixel residuals (per coordinate); tol the matching tolerance, px.

A total is the terms added one after another in table order (0.0 + w₁·v₁ + w₂·v₂ + …),
so a breakdown's :attr:`ScoreBreakdown.total` is the score itself, to the last bit.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..errors import ParameterError

__all__ = ["Term", "OVERLAYER_TERMS", "SUBSTRATE_TERMS", "ScoreBreakdown", "formula", "overlayer_breakdown",
           "substrate_breakdown", "irrational_handicap", "population_gain"]


@dataclass(frozen=True)
class Term:
    """One named term of a score: it adds ``weight · value``.

    Attributes
    ----------
    name : str
        Key of the term in a :class:`ScoreBreakdown`.
    weight : float
    symbol : str
        How the formula writes the value.
    meaning : str
        One line.
    """

    name: str
    weight: float
    symbol: str
    meaning: str


OVERLAYER_TERMS = (
    Term("explained", 1.0, "E", "fractional spots explained (trusted spots)"),
    Term("satellites", -0.25, "S", "of those, spots explained only as satellites: they count ¾"),
    Term("unexplained", -1.0, "U", "fractional spots left unexplained (trusted spots)"),
    Term("extra_domains", -1.0, "(D − 1)", "domains used beyond the first"),
    Term("cell_size", -0.5, "|log₂ det M|", "the cell's area away from the substrate's, in octaves"),
    Term("coincidence", -1.0, "K",
         "log₂ q for a rational matrix that is not integer, q the common denominator of its entries: "
         "a coincidence cell puts adsorbates on inequivalent sites and needs more description"),
    Term("miss", -1.0, "mean((miss/tol)²)", "mean squared miss of the explained spots, in tolerances"),
    Term("satellite_contrast", 1.0, "tanh(ΔlogI)", "the layer's own beams outshine its satellites"),
    Term("moire_contrast", 2.0, "Q",
         "in a moiré every net of the moiré module explains the same spots: the layer is the one whose "
         "own beams outshine the satellites"),
    Term("moire_symmetry", -2.0, "Y",
         "in a moiré, a net of lower symmetry than the substrate's that shows only some of its "
         "symmetry domains is one of the moiré module's many nets, not the layer"),
    Term("absent", -0.5, "A", "predicted fractional beams absent where a spot could be seen"),
    Term("irrational", -1.0, "H", "handicap of an incommensurate model, 1.5 + 0.05·E′ + 2·(D − 1)"),
    Term("populations", 1.0, "P", "gain of unequal domain populations, D·tanh(max(ln r − ln 2, 0))"),
)

SUBSTRATE_TERMS = (
    Term("completeness", 4.0, "C", "predicted integer beams in the seen region that were found"),
    Term("indexable", 2.0, "X", "spots on integer or simple fractional positions"),
    Term("brightness", 1.0, "tanh(ΔlogI)", "integer beams outshine the brightest of the other spots"),
    Term("scale_prior", -0.5, "z²", "camera scale away from the screen-size prior, in its widths"),
    Term("residual", -1.0, "rms/tol", "RMS pixel residual of the fit, in tolerances"),
)

_FRACTIONS = {0.25: "¼", 0.5: "½", 0.75: "¾"}


def formula(terms: tuple) -> str:
    """The score as the docstrings write it, from a table of terms.

    Parameters
    ----------
    terms : tuple of Term
        The table (:data:`OVERLAYER_TERMS` or :data:`SUBSTRATE_TERMS`).

    Returns
    -------
    str
        ``"score = ..."`` with the weights as fractions where they are ¼, ½ or ¾.

    Examples
    --------
    >>> print(formula(SUBSTRATE_TERMS))
    score = 4·C + 2·X + tanh(ΔlogI) − ½·z² − rms/tol
    """
    out = []
    for t in terms:
        w = abs(t.weight)
        coef = "" if w == 1.0 else f"{_FRACTIONS.get(w, f'{w:g}')}·"
        sign = "−" if t.weight < 0 else "+"
        out.append(f"{coef}{t.symbol}" if not out and sign == "+" else f"{sign} {coef}{t.symbol}")
    return "score = " + " ".join(out)


@dataclass(frozen=True, eq=False)
class ScoreBreakdown:
    """The values of a score's named terms for one candidate.

    Attributes
    ----------
    terms : tuple of Term
        The table (:data:`OVERLAYER_TERMS` or :data:`SUBSTRATE_TERMS`).
    values : tuple of float
        One value per term, in table order (0 for a term that does not apply).

    Examples
    --------
    >>> b = ScoreBreakdown.of(OVERLAYER_TERMS, explained=6, unexplained=1, absent=2)
    >>> print(b.total, b["absent"], b.contributions()["absent"])
    4.0 2.0 -1.0
    """

    terms: tuple
    values: tuple

    @classmethod
    def of(cls, terms: tuple, **values) -> "ScoreBreakdown":
        """A breakdown from the values by term name; missing terms are 0.

        Parameters
        ----------
        terms : tuple of Term
            The table.
        **values
            The value of each named term.

        Returns
        -------
        ScoreBreakdown
            The breakdown.

        Raises
        ------
        ParameterError
            When a name is not in the table.
        """
        names = [t.name for t in terms]
        unknown = sorted(set(values) - set(names))
        if unknown:
            raise ParameterError(f"Unknown score terms {unknown}; the table has {names}.")
        return cls(tuple(terms), tuple(float(values.get(n, 0.0)) for n in names))

    def __getitem__(self, name: str) -> float:
        for t, v in zip(self.terms, self.values):
            if t.name == name:
                return v
        raise KeyError(name)

    @property
    def total(self) -> float:
        """Σ weight · value, added in table order (the score)."""
        s = 0.0
        for t, v in zip(self.terms, self.values):
            s += t.weight * v
        return float(s)

    def contributions(self) -> dict:
        """Each term's share of the score (weight · value), by name.

        Returns
        -------
        dict
            ``{name: weight · value}`` in table order.
        """
        return {t.name: t.weight * v + 0.0 for t, v in zip(self.terms, self.values)}  # + 0.0: no −0

    def replace(self, **values) -> "ScoreBreakdown":
        """The same breakdown with some values changed.

        Parameters
        ----------
        **values
            The new value of each named term.

        Returns
        -------
        ScoreBreakdown
            A new breakdown.
        """
        return ScoreBreakdown.of(self.terms, **{**dict(zip((t.name for t in self.terms), self.values)), **values})

    def to_dict(self) -> dict:
        """JSON-safe: ``{name: {"value", "weight", "contribution"}}`` in table order, and ``"total"``.

        Returns
        -------
        dict
            Plain JSON types.
        """
        share = self.contributions()
        d = {t.name: {"value": v, "weight": t.weight, "contribution": share[t.name]}
             for t, v in zip(self.terms, self.values)}
        return {"terms": d, "total": self.total}


def overlayer_breakdown(*, explained: int, satellites: int, unexplained: int, n_domains: int, det: float,
                        miss: np.ndarray | None = None, own_log_i: np.ndarray | None = None,
                        satellite_log_i: np.ndarray | None = None, moire: bool = False,
                        symmetry_domains: int | None = None, denominator: int = 1) -> ScoreBreakdown:
    """The overlayer terms known before the absent beams are counted (A, H and P are 0).

    Parameters
    ----------
    explained, satellites, unexplained : int
        E, S and U over the trusted spots.
    n_domains : int
        D, the domains used.
    det : float
        |det M| of the first domain.
    miss : (K,) ndarray of float, optional
        Miss of each explained trusted spot, in tolerances.
    own_log_i, satellite_log_i : ndarray of float, optional
        Log intensities of the layer's own beams and of its satellite-only spots.
    moire : bool, optional
        The layer nearly coincides with the substrate and its satellites of several orders were
        allowed: the contrast then also counts as ``moire_contrast``, and the domains left out
        of the net's `symmetry_domains` as ``moire_symmetry``.
    symmetry_domains : int, optional
        The number of symmetry domains of the net on the substrate.
    denominator : int, optional
        q, the common denominator of a rational matrix's entries (1 for an integer matrix).

    Returns
    -------
    ScoreBreakdown
        The :data:`OVERLAYER_TERMS` values; ``absent``, ``irrational`` and ``populations`` are 0.

    Examples
    --------
    >>> b = overlayer_breakdown(explained=8, satellites=0, unexplained=0, n_domains=2, det=4.0,
    ...                         miss=np.array([0.5, 0.5]))
    >>> print(b.total, b.contributions()["cell_size"])
    5.75 -1.0
    """
    values = dict(explained=explained, satellites=satellites, unexplained=unexplained,
                  extra_domains=n_domains - 1, cell_size=abs(math.log2(det)),
                  coincidence=math.log2(max(int(denominator), 1)))
    if miss is not None and len(miss):
        values["miss"] = float(np.mean(miss**2))
    if own_log_i is not None and satellite_log_i is not None and len(own_log_i) and len(satellite_log_i):
        values["satellite_contrast"] = math.tanh(float(np.median(own_log_i) - np.median(satellite_log_i)))
        if moire:
            values["moire_contrast"] = values["satellite_contrast"]
    if moire and symmetry_domains:
        values["moire_symmetry"] = 1.0 - n_domains / symmetry_domains
    return ScoreBreakdown.of(OVERLAYER_TERMS, **values)


def substrate_breakdown(*, completeness: float, indexable: float, brightness_log_ratio: float,
                        z: float | None, residual_rms_px: float, tol_px: float) -> ScoreBreakdown:
    """The substrate terms of one reading (``z`` None: no scale prior).

    Parameters
    ----------
    completeness : float, keyword-only
        C, the fraction (0–1) of predicted integer beams in the seen region that were found.
    indexable : float, keyword-only
        X, the fraction (0–1) of spots on integer or simple fractional positions.
    brightness_log_ratio : float, keyword-only
        ΔlogI, the integer spots' median log intensity over the others' 90th percentile.
    z : float or None, keyword-only
        The camera scale's distance from the screen-size prior, in prior widths.
    residual_rms_px : float, keyword-only
        RMS pixel residual of the fit (per coordinate).
    tol_px : float, keyword-only
        The matching tolerance, pixels.

    Returns
    -------
    ScoreBreakdown
        The :data:`SUBSTRATE_TERMS` values.

    Examples
    --------
    >>> b = substrate_breakdown(completeness=1.0, indexable=1.0, brightness_log_ratio=0.0, z=1.0,
    ...                         residual_rms_px=0.5, tol_px=2.5)
    >>> print(round(b.total, 6))
    5.3
    """
    values = dict(completeness=completeness, indexable=indexable, brightness=math.tanh(brightness_log_ratio),
                  residual=residual_rms_px / tol_px)
    if z is not None:
        values["scale_prior"] = z * z
    return ScoreBreakdown.of(SUBSTRATE_TERMS, **values)


def irrational_handicap(explained: int, n_domains: int) -> float:
    """H of an irrational (incommensurate) model that explains `explained` spots with `n_domains` domains.

    Parameters
    ----------
    explained : int
        E′, every spot the model explains.
    n_domains : int
        Domains the model uses.

    Returns
    -------
    float
        H = 1.5 + 0.05·E′ + 2·(D − 1).

    Examples
    --------
    >>> print(irrational_handicap(10, 1), irrational_handicap(10, 2))
    2.0 4.0
    """
    return 1.5 + 0.05 * explained + 2.0 * (n_domains - 1)


def population_gain(ratio: float, n_domains: int) -> float:
    """P of a rational multi-domain model whose population test gave the variance ratio `ratio`.

    Parameters
    ----------
    ratio : float
        Variance ratio of the population test (> 0).
    n_domains : int
        Domains the model uses.

    Returns
    -------
    float
        P = D·tanh(max(ln r − ln 2, 0)).

    Examples
    --------
    >>> print(population_gain(2.0, 3), round(population_gain(20.0, 2), 4))
    0.0 1.9604
    """
    return n_domains * math.tanh(max(math.log(ratio) - math.log(2.0), 0.0))
