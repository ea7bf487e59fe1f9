"""How a network survey sees the true network: name generators, recall, non-response, false ties.

Outcomes happen on the true network ``A``; the analyst runs every estimator
on the observed network ``Ã`` a survey returns (METHODS.md §7.1).  A
``MeasurementModel`` states the survey; ``observe_network`` draws one
observed network from it.  Pure functions of plain data: the engine owns the
random stream (``designcalc.engine``, stream family 3).

The survey, per unit ``i`` (METHODS §7.1 (a)-(d)):

1. ``i`` responds with probability ``1 - non_response``; a non-respondent
   names nobody (but may be named by others).
2. A respondent recalls each true contact independently with probability
   ``tie_recall`` and adds ``Poisson(false_ties)`` false contacts, drawn
   uniformly from the units that are not true contacts (nor ``i``).
3. With ``contact_cap = k``, at most ``k`` of these are kept: uniformly at
   random (``cap_rule = "random"``) or the ``k`` strongest
   (``"strongest"``: by the edge list's tie weights when it has them,
   otherwise by i.i.d. uniform strengths; false ties get a random strength).
4. The kept names are directed nominations ``D``; the observed network is
   ``D or Dᵀ`` (``symmetrise = "either"``) or ``D and Dᵀ`` (``"both"``).

With ``augmented = True`` each respondent also reports their total number of
contacts (the augmented fixed-choice design of Ott et al. 2019), which the
engine uses to re-weight the HT spillover estimator (``inclusion_weights``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy as sp
import scipy.sparse

from designcalc.errors import ModelError
from designcalc.graphs import to_csr

__all__ = ["CAP_RULES", "SYMMETRISE_RULES", "MeasurementModel", "ObservedNetwork", "inclusion_weights", "observe_network"]

CAP_RULES = ("random", "strongest")
SYMMETRISE_RULES = ("either", "both")

#: Redraw rounds for false-tie targets that hit a true contact, the unit itself or a repeat.
_MAX_REDRAW_ROUNDS = 64


@dataclass(frozen=True)
class MeasurementModel:
    """A network survey (module docstring); checks its own ranges.

    Attributes
    ----------
    contact_cap
        Most contacts a respondent may name (``None``: no cap), ``>= 1``.
    cap_rule
        ``"random"`` or ``"strongest"``: which contacts a capped respondent names.
    symmetrise
        ``"either"`` (a tie if either names the other) or ``"both"`` (only reciprocated names).
    tie_recall
        Probability that a respondent recalls a given true contact, in ``[0, 1]``.
    non_response
        Probability that a unit does not answer the network question, in ``[0, 1)``.
    false_ties
        Expected number of false contacts named per respondent, ``>= 0``.
    augmented
        Respondents also report their total number of contacts.
    attrition_treated, attrition_control
        Probability that a treated (untreated) unit's outcome is never
        observed, in ``[0, 1)``: equal for outcomes missing completely at
        random, different for attrition related to treatment.  Drawn for
        every assignment; the analysis then uses the observed outcomes only
        (complete cases; ``engine`` module docstring).
    """

    contact_cap: int | None = None
    cap_rule: str = "random"
    symmetrise: str = "either"
    tie_recall: float = 1.0
    non_response: float = 0.0
    false_ties: float = 0.0
    augmented: bool = False
    attrition_treated: float = 0.0
    attrition_control: float = 0.0

    def __post_init__(self) -> None:
        if self.contact_cap is not None and (isinstance(self.contact_cap, bool) or int(self.contact_cap) != self.contact_cap or self.contact_cap < 1):
            raise ModelError(f"`contact_cap` must be a whole number >= 1 or None; got {self.contact_cap!r}.")
        if self.cap_rule not in CAP_RULES:
            raise ModelError(f"`cap_rule` must be one of {', '.join(CAP_RULES)}; got {self.cap_rule!r}.")
        if self.symmetrise not in SYMMETRISE_RULES:
            raise ModelError(f"`symmetrise` must be one of {', '.join(SYMMETRISE_RULES)}; got {self.symmetrise!r}.")
        if not 0.0 <= self.tie_recall <= 1.0:
            raise ModelError(f"`tie_recall` must be a number in [0, 1]; got {self.tie_recall!r}.")
        if not 0.0 <= self.non_response < 1.0:
            raise ModelError(f"`non_response` must be a number in [0, 1); got {self.non_response!r}.")
        if not 0.0 <= self.false_ties <= 1000.0:
            raise ModelError(f"`false_ties` must be a number in [0, 1000]; got {self.false_ties!r}.")
        for name in ("attrition_treated", "attrition_control"):
            if not 0.0 <= getattr(self, name) < 1.0:
                raise ModelError(f"`{name}` must be a number in [0, 1); got {getattr(self, name)!r}.")

    @property
    def attrition(self) -> bool:
        """Whether some outcomes go unobserved."""
        return self.attrition_treated > 0.0 or self.attrition_control > 0.0

    @property
    def perfect(self) -> bool:
        """No cap, full recall, everyone responds, no false ties: the survey sees the true network."""
        return self.contact_cap is None and self.tie_recall == 1.0 and self.non_response == 0.0 and self.false_ties == 0.0

    def describe(self) -> str:
        parts = [f"at most {self.contact_cap} contacts named ({self.cap_rule})" if self.contact_cap is not None else "no cap on contacts named"]
        parts.append(f"ties kept if {'either' if self.symmetrise == 'either' else 'both'} name{'s' if self.symmetrise == 'either' else ''} the other")
        if self.tie_recall < 1.0:
            parts.append(f"tie recall {self.tie_recall:g}")
        if self.non_response > 0.0:
            parts.append(f"non-response {self.non_response:g}")
        if self.false_ties > 0.0:
            parts.append(f"{self.false_ties:g} false contacts per respondent")
        if self.augmented:
            parts.append("total contacts reported (augmented)")
        if self.attrition:
            if self.attrition_treated == self.attrition_control:
                parts.append(f"{self.attrition_treated:.0%} of outcomes missing at random")
            else:
                parts.append(f"outcomes missing for {self.attrition_treated:.0%} of treated and {self.attrition_control:.0%} of untreated units")
        return "; ".join(parts)


@dataclass(frozen=True, eq=False)
class ObservedNetwork:
    """One survey's result: the observed network and what the analyst knows about each unit.

    Attributes
    ----------
    adjacency
        Symmetric 0/1 canonical CSR (float64 data, int32 indices) of ``Ã``.
    named
        Contacts each unit named (after the cap), ``(n,)`` int64; 0 for non-respondents.
    responded
        Whether each unit answered, ``(n,)`` bool.
    reported_degree
        With an augmented survey, each respondent's reported total number of
        contacts (its true degree), 0 for non-respondents; otherwise None.
    n_true_ties, n_true_ties_observed, n_false_ties_observed
        Ties of the true network, those of them in ``Ã``, and ties of ``Ã``
        that are not true ties.
    """

    adjacency: sp.sparse.csr_array
    named: np.ndarray
    responded: np.ndarray
    reported_degree: np.ndarray | None
    n_true_ties: int
    n_true_ties_observed: int
    n_false_ties_observed: int

    @property
    def degrees(self) -> np.ndarray:
        return np.diff(self.adjacency.indptr).astype(np.int64)

    @property
    def share_true_ties_observed(self) -> float:
        return self.n_true_ties_observed / self.n_true_ties if self.n_true_ties else 1.0


def _row_of_entries(indptr: np.ndarray) -> np.ndarray:
    return np.repeat(np.arange(indptr.size - 1, dtype=np.int64), np.diff(indptr))


def _aligned_weights(adjacency: sp.sparse.csr_array, weights: sp.sparse.csr_array) -> np.ndarray:
    """Tie weights in the order of ``adjacency``'s stored entries (same sparsity pattern required)."""
    w = sp.sparse.csr_array(weights)
    w.sort_indices()
    if w.shape != adjacency.shape or w.nnz != adjacency.nnz or not np.array_equal(w.indices, adjacency.indices) or not np.array_equal(w.indptr, adjacency.indptr):
        raise ModelError("`weights` must have the same sparsity pattern as `adjacency` (one weight per tie).")
    return np.asarray(w.data, dtype=np.float64)


def _false_targets(n: int, rows: np.ndarray, true_keys: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """A uniform non-contact target for every false nomination of ``rows``, without repeats within a row.

    Rejection: draw a target uniformly, redraw those that hit the unit
    itself, a true contact or an earlier false nomination of the same unit.
    On sparse networks a redraw is rare, so the work is O(false ties).
    """
    targets = rng.integers(0, n, size=rows.size)
    todo = np.arange(rows.size)
    for _ in range(_MAX_REDRAW_ROUNDS):
        if todo.size == 0:
            break
        keys = rows * n + targets
        bad = (targets == rows) | _isin_sorted(keys, true_keys)
        # A repeat within a row: keep the first, redraw the others.
        _, first = np.unique(keys, return_index=True)
        repeat = np.ones(rows.size, dtype=bool)
        repeat[first] = False
        bad |= repeat
        todo = np.flatnonzero(bad)
        targets[todo] = rng.integers(0, n, size=todo.size)
    else:
        raise ModelError("false ties: could not place every false tie on a non-contact (is the network nearly complete?)")
    return targets


def _isin_sorted(values: np.ndarray, sorted_keys: np.ndarray) -> np.ndarray:
    if sorted_keys.size == 0:
        return np.zeros(values.shape, dtype=bool)
    position = np.minimum(np.searchsorted(sorted_keys, values), sorted_keys.size - 1)
    return sorted_keys[position] == values


def observe_network(
    adjacency: sp.sparse.csr_array,
    model: MeasurementModel,
    rng: np.random.Generator,
    *,
    weights: sp.sparse.csr_array | None = None,
) -> ObservedNetwork:
    """Draw the network a survey would return from the true network.

    Parameters
    ----------
    adjacency
        The true network: symmetric 0/1 canonical CSR (sorted indices, zero diagonal).
    model
        The survey.
    rng
        The measurement stream (the engine's stream family 3).
    weights
        Tie weights with ``adjacency``'s sparsity pattern (a surveyed edge
        list's third column), used by ``cap_rule = "strongest"``; without
        them strengths are i.i.d. uniform.

    Returns
    -------
    ObservedNetwork

    Notes
    -----
    Draws, in this order: responses (n uniforms), recall (one uniform per
    stored entry), false-tie counts (n Poisson), false-tie targets, then the
    cap's keys (one uniform per candidate name, plus strengths under
    ``"strongest"`` without weights).  Everything is vectorised over stored
    entries: ranking within a respondent is one ``np.lexsort`` on
    (row, key), so the cost is O(E log E) for E stored entries, with no
    dense array.  The module docstring gives the model (METHODS.md §7.1).

    Examples
    --------
    >>> import numpy as np
    >>> from designcalc.graphs import to_csr
    >>> star = to_csr(5, np.array([0, 0, 0, 0]), np.array([1, 2, 3, 4]))
    >>> seen = observe_network(star, MeasurementModel(contact_cap=2, symmetrise="both"), np.random.default_rng(1))
    >>> int(seen.adjacency.nnz // 2)  # the centre names 2 of its 4 leaves; each leaf names the centre
    2
    """
    n = int(adjacency.shape[0])
    indptr = np.asarray(adjacency.indptr, dtype=np.int64)
    cols = np.asarray(adjacency.indices, dtype=np.int64)
    rows = _row_of_entries(indptr)
    degree = np.diff(indptr)
    strengths_true = _aligned_weights(adjacency, weights) if weights is not None else None

    responded = rng.random(n) >= model.non_response
    recalled = rng.random(rows.size) < model.tie_recall if model.tie_recall < 1.0 else np.ones(rows.size, dtype=bool)
    keep = responded[rows] & recalled
    cand_rows, cand_cols = rows[keep], cols[keep]
    cand_true = np.ones(cand_rows.size, dtype=bool)
    cand_strength = strengths_true[keep] if strengths_true is not None else None

    if model.false_ties > 0.0:
        counts = rng.poisson(model.false_ties, size=n)
        counts = np.where(responded, np.minimum(counts, n - 1 - degree), 0)
        false_rows = np.repeat(np.arange(n, dtype=np.int64), counts)
        false_cols = _false_targets(n, false_rows, rows * n + cols, rng)
        cand_rows = np.concatenate([cand_rows, false_rows])
        cand_cols = np.concatenate([cand_cols, false_cols])
        cand_true = np.concatenate([cand_true, np.zeros(false_rows.size, dtype=bool)])
        if cand_strength is not None:
            # A false tie gets the weight of a tie drawn at random from the edge list.
            drawn = strengths_true[rng.integers(0, strengths_true.size, size=false_rows.size)] if strengths_true.size else np.zeros(false_rows.size)
            cand_strength = np.concatenate([cand_strength, drawn])

    if model.contact_cap is not None:
        key = rng.random(cand_rows.size)  # uniform order: random choice, and the tie-break among equal strengths
        if model.cap_rule == "strongest":
            strength = cand_strength if cand_strength is not None else rng.random(cand_rows.size)
            order = np.lexsort((key, -strength, cand_rows))
        else:
            order = np.lexsort((key, cand_rows))
        sorted_rows = cand_rows[order]
        row_start = np.searchsorted(sorted_rows, sorted_rows, side="left")
        rank = np.arange(sorted_rows.size) - row_start
        chosen = order[rank < model.contact_cap]
        chosen.sort()  # back to candidate order, so what follows does not depend on the keys' order
        cand_rows, cand_cols, cand_true = cand_rows[chosen], cand_cols[chosen], cand_true[chosen]

    named = np.bincount(cand_rows, minlength=n).astype(np.int64)
    low, high = np.minimum(cand_rows, cand_cols), np.maximum(cand_rows, cand_cols)
    pair_keys, pair_counts = np.unique(low * n + high, return_counts=True)
    if model.symmetrise == "both":
        pair_keys = pair_keys[pair_counts == 2]  # named from both ends (each direction appears at most once)
    a, b = pair_keys // n if n else pair_keys, pair_keys % n if n else pair_keys
    observed = to_csr(n, a, b)
    # A pair is a true tie when it is in the true network's entry keys.
    true_pair = _isin_sorted(pair_keys, rows * n + cols)
    reported = np.where(responded, degree, 0).astype(np.int64) if model.augmented else None
    return ObservedNetwork(
        adjacency=observed,
        named=named,
        responded=responded,
        reported_degree=reported,
        n_true_ties=int(adjacency.nnz // 2),
        n_true_ties_observed=int(np.count_nonzero(true_pair)),
        n_false_ties_observed=int(pair_keys.size - np.count_nonzero(true_pair)),
    )


def inclusion_weights(observed: ObservedNetwork, model: MeasurementModel) -> sp.sparse.csr_array:
    """``Ã_ij / p̂_ij``: each observed tie weighted by one over its estimated chance of being observed.

    Needs an augmented survey (each respondent's reported total degree ``d_i``).

    Notes
    -----
    Derivation (METHODS.md §7.4; the augmented fixed-choice design of Ott,
    Harrison, Gile, Barnett & Hogan 2019, Biostatistics 20(1):97-110, which
    asks respondents for their total number of ties to undo the censoring by
    degree).  A respondent who reports ``d_i`` contacts and names ``m_i``
    names a given true contact with estimated probability
    ``s_i = min(1, m_i / d_i)`` (exact under a random cap with full recall,
    where ``m_i = min(k, d_i)`` of ``d_i`` are named uniformly); a
    non-respondent names nobody, ``s_i = 0``.  Names are made independently
    by the two ends, so a true tie is observed with probability
    ``p_ij = 1 - (1 - s_i)(1 - s_j)`` under ``"either"`` and ``s_i s_j``
    under ``"both"``.  The survey happens before and independently of the
    assignment, so ``E[Ã_ij / p_ij | A] = A_ij`` and the centred HT
    spillover estimator ``(1/n) sum_i omega_i sum_j (Ã_ij / p_ij)(Y_j - c)``
    keeps the exact unbiasedness it has on the true network (METHODS §3.1):
    conditionally on the survey its expectation over assignments is
    ``(1/n) sum_ij (Ã_ij / p_ij) e_ij`` with ``e_ij`` the effect of ``i`` on
    ``j``, whose expectation over the survey is ``tau_IND``.  False ties
    join non-contacts, whose ``e_ij = 0``, so they add variance but no bias.
    With recall below 1 or a cap by tie strength ``s_i`` is an estimate
    (strongest ties are not a random subset), so the correction is then
    approximate.  An observed tie always has ``p_ij > 0`` (someone named it).
    """
    if observed.reported_degree is None:
        raise ModelError("inclusion weights need an augmented survey (each respondent's total number of contacts)")
    d = observed.reported_degree.astype(np.float64)
    share = np.divide(observed.named, d, out=np.zeros_like(d), where=d > 0)
    share = np.where(observed.responded, np.minimum(share, 1.0), 0.0)
    A = observed.adjacency
    rows = _row_of_entries(np.asarray(A.indptr, dtype=np.int64))
    s_i, s_j = share[rows], share[A.indices]
    p = 1.0 - (1.0 - s_i) * (1.0 - s_j) if model.symmetrise == "either" else s_i * s_j
    # Guard: a named tie always has p > 0 unless a respondent reported 0 contacts yet named some (false ties only).
    p = np.where(p > 0, p, 1.0)
    out = sp.sparse.csr_array((1.0 / p, A.indices, A.indptr), shape=A.shape)
    return out
