"""Write scenarios/harrow_fen_contacts.csv, the invented contact network of the `designcalc fit` demo.

Harrow Fen is an invented fenland parish of four hamlets (Harrow End, Fen
Drove, Saltings and Mill Lode); every household, id and tie below is made up.
About 400 households; the ties come from a four-block model (households
mostly know people in their own hamlet) plus triangle closure (a friend of a
friend often becomes a friend), so the network clusters more than any block
model can, and the goodness-of-fit check of `designcalc fit` has something
to warn about.

The file is what a survey export might look like: a header, household ids
that encode the hamlet (1xxx, 2xxx, ...), a weight column (days of contact
in a typical week, 1-7), and some ties reported by both households, so they
appear twice, once in each direction.

It uses numpy only, not designcalc's samplers, so the demo data do not
change when the samplers' random streams do.  Run from the repository root:

    python scenarios/make_harrow_fen_contacts.py
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

SEED = 20260815
HAMLET_SIZES = (140, 110, 90, 60)
# Expected contacts of a household within its own hamlet and with each other hamlet, before closure.
WITHIN_DEGREE = 5.0
BETWEEN_DEGREE = 0.45
# Share of open two-paths (i - j - k, i and k not tied) closed into triangles, in one sweep.
CLOSURE = 0.08
# Share of ties both households reported (listed twice, once each way).
REPORTED_BY_BOTH = 0.15

OUT = Path(__file__).with_name("harrow_fen_contacts.csv")


def contact_ties(rng: np.random.Generator) -> tuple[np.ndarray, list[tuple[int, int]]]:
    """Hamlet of each household and the undirected ties (i < j): a block model, then triangle closure."""
    sizes = np.array(HAMLET_SIZES)
    hamlet = np.repeat(np.arange(sizes.size), sizes)
    n = hamlet.size
    p_within = WITHIN_DEGREE / (sizes - 1)
    upper = np.triu(np.ones((n, n), dtype=bool), 1)
    same = hamlet[:, None] == hamlet[None, :]
    # Between hamlets one probability, set for an average-sized hamlet's outsiders.
    p_between = BETWEEN_DEGREE / (n - n / sizes.size)
    probability = np.where(same, p_within[hamlet][:, None], p_between)
    tie = upper & (rng.random((n, n)) < probability)
    tie = tie | tie.T
    # One sweep of triadic closure on the block-model graph's open two-paths.
    two_paths = tie.astype(np.int64) @ tie.astype(np.int64)
    open_pairs = upper & ~tie & (two_paths > 0)
    # A pair joined by several two-paths is more likely to close: 1 - (1 - c)^paths.
    close = open_pairs & (rng.random((n, n)) < 1.0 - (1.0 - CLOSURE) ** two_paths)
    tie = tie | close | close.T
    i, j = np.nonzero(np.triu(tie, 1))
    return hamlet, list(zip(i.tolist(), j.tolist()))


def main() -> None:
    rng = np.random.default_rng(SEED)
    hamlet, ties = contact_ties(rng)
    # Invented household ids: hamlet digit, then a shuffled house number.
    house = np.concatenate([rng.permutation(np.arange(1, s + 1) * 3 + 7) for s in HAMLET_SIZES])
    ids = (hamlet + 1) * 1000 + house
    lines = ["household,contact,days_per_week"]
    for a, b in ties:
        days = int(rng.integers(1, 8))
        if rng.random() < 0.5:
            a, b = b, a
        lines.append(f"{ids[a]},{ids[b]},{days}")
        if rng.random() < REPORTED_BY_BOTH:
            lines.append(f"{ids[b]},{ids[a]},{days}")
    OUT.write_text("\n".join(lines) + "\n", encoding="utf-8")
    print(f"wrote {OUT} ({len(ties)} ties, {len(lines) - 1} lines, {hamlet.size} households)")


if __name__ == "__main__":
    main()
