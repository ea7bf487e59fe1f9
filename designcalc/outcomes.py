"""The outcome model: how a unit's outcome responds to its own and its neighbours' treatment.

    f(theta, w, x) = baseline + theta + direct * w + spillover * s(x) + interaction * w * s(x)

with theta the unit's latent-type effect (a function of u, so outcomes
correlate with network community), w its own treatment, x the fraction of its
neighbours treated (0 for isolates; METHODS.md §0, §1.4) and s a spillover
shape with s(0) = 0 and s(1) = 1:

* ``linear``: s(x) = x;
* ``saturating``: s(x) = (1 - exp(-r x)) / (1 - exp(-r)), concave, rate r > 0;
* ``threshold``: s(x) = 1 when x >= t, else 0.

Continuous outcomes add normal noise with SD ``noise_sd``.  Binary outcomes
are Bernoulli with probability f itself clipped to [0, 1] (``link =
"identity"``: the planner states probabilities and risk differences) or
1 / (1 + exp(-f)) (``link = "logistic"``: f on the log-odds scale).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from designcalc.errors import ModelError
from designcalc.expression import compile_expression

__all__ = ["OutcomeModel", "SPILLOVER_SHAPES", "spillover_shape_value"]

SPILLOVER_SHAPES = ("linear", "saturating", "threshold")


def spillover_shape_value(shape: str, x: np.ndarray, *, rate: float = 4.0, threshold: float = 0.5) -> np.ndarray:
    """s(x) for the named shape, normalised so s(0) = 0 and s(1) = 1."""
    x = np.asarray(x, dtype=float)
    if shape == "linear":
        return x
    if shape == "saturating":
        return -np.expm1(-rate * x) / -np.expm1(-rate)
    if shape == "threshold":
        # A tiny tolerance keeps m/N exactly at the threshold on the right side.
        return (x >= threshold - 1e-12).astype(float)
    raise ModelError(f"unknown spillover shape {shape!r}; choose one of {SPILLOVER_SHAPES}")


@dataclass(frozen=True)
class OutcomeModel:
    """Outcome model with interference through the share of treated neighbours.

    Parameters
    ----------
    kind
        ``"continuous"`` or ``"binary"``.
    baseline
        Outcome level of an untreated unit with no treated neighbours and
        type effect zero (a probability or log-odds for binary outcomes).
    type_effect
        Expression in ``u`` giving theta(u); empty for none.
    block_effects
        Alternatively, one theta per block of a block model.
    noise_sd
        SD of the normal noise (continuous outcomes only).
    direct_effect, spillover_effect, interaction
        Coefficients of w, s(x) and w * s(x).
    spillover_shape, saturation_rate, threshold
        The shape s and its parameter.
    link
        ``"identity"`` (clipped) or ``"logistic"``, binary outcomes only.
    """

    kind: str = "continuous"
    baseline: float = 0.0
    type_effect: str = ""
    block_effects: tuple[float, ...] = ()
    noise_sd: float = 1.0
    direct_effect: float = 0.0
    spillover_effect: float = 0.0
    spillover_shape: str = "linear"
    saturation_rate: float = 4.0
    threshold: float = 0.5
    interaction: float = 0.0
    link: str = "identity"
    # Intracluster correlation of a normal cluster random effect (clustered populations, designcalc.clusters).
    cluster_icc: float = 0.0

    def __post_init__(self) -> None:
        if self.kind not in ("continuous", "binary"):
            raise ModelError(f"outcome kind must be 'continuous' or 'binary'; got {self.kind!r}")
        if self.spillover_shape not in SPILLOVER_SHAPES:
            raise ModelError(f"unknown spillover shape {self.spillover_shape!r}")
        if self.link not in ("identity", "logistic"):
            raise ModelError(f"link must be 'identity' or 'logistic'; got {self.link!r}")
        if not 0.0 <= self.cluster_icc < 1.0:
            raise ModelError(f"cluster_icc must be in [0, 1); got {self.cluster_icc}")
        if not self.noise_sd >= 0:
            raise ModelError(f"noise_sd must be >= 0; got {self.noise_sd}")
        if self.type_effect:
            compile_expression(self.type_effect, variables=("u",))

    # -- the response function ------------------------------------------------
    def type_values(self, types: np.ndarray, blocks: np.ndarray | None = None) -> np.ndarray:
        """theta_i for each unit from its latent type (and block, for block effects)."""
        types = np.asarray(types, dtype=float)
        theta = np.zeros_like(types)
        if self.type_effect:
            theta = theta + compile_expression(self.type_effect, variables=("u",))(u=types)
        if self.block_effects:
            if blocks is None:
                raise ModelError("block_effects need a block model")
            theta = theta + np.asarray(self.block_effects, dtype=float)[blocks]
        return theta

    def linear_predictor(self, theta: np.ndarray, w: np.ndarray, x: np.ndarray) -> np.ndarray:
        s = spillover_shape_value(self.spillover_shape, x, rate=self.saturation_rate, threshold=self.threshold)
        return (
            self.baseline
            + theta
            + self.direct_effect * w
            + self.spillover_effect * s
            + self.interaction * w * s
        )

    def mean_outcome(self, theta: np.ndarray, w: np.ndarray, x: np.ndarray) -> np.ndarray:
        """f(theta, w, x): the expected outcome given type, own treatment and exposure."""
        eta = self.linear_predictor(theta, w, x)
        if self.kind == "continuous":
            return eta
        if self.link == "logistic":
            return 0.5 * (1.0 + np.tanh(0.5 * eta))  # logistic without overflow
        return np.clip(eta, 0.0, 1.0)

    def draw(self, mean: np.ndarray, *, rng: np.random.Generator) -> np.ndarray:
        """Outcomes given their means: add noise, or draw Bernoulli."""
        if self.kind == "continuous":
            if self.noise_sd == 0:
                return np.array(mean, dtype=float)
            return mean + self.noise_sd * rng.standard_normal(mean.shape)
        return (rng.random(mean.shape) < mean).astype(float)

    # -- variants used by the engine and the solvers --------------------------
    def null_for(self, estimand: str) -> "OutcomeModel":
        """The same model with the tested effect set to zero.

        The interaction is zeroed too: with it, neither the direct nor the
        spillover estimand is zero (METHODS.md §1.4, linear-in-means example).
        """
        if estimand == "direct":
            return replace(self, direct_effect=0.0, interaction=0.0)
        if estimand == "spillover":
            return replace(self, spillover_effect=0.0, interaction=0.0)
        if estimand == "total":
            return replace(self, direct_effect=0.0, spillover_effect=0.0, interaction=0.0)
        raise ModelError(f"unknown estimand {estimand!r}")

    def scaled_for(self, estimand: str, factor: float) -> "OutcomeModel":
        """The same model with the coefficients behind one estimand multiplied by ``factor``."""
        if estimand == "direct":
            return replace(self, direct_effect=self.direct_effect * factor, interaction=self.interaction * factor)
        if estimand == "spillover":
            return replace(self, spillover_effect=self.spillover_effect * factor, interaction=self.interaction * factor)
        if estimand == "total":
            return replace(
                self,
                direct_effect=self.direct_effect * factor,
                spillover_effect=self.spillover_effect * factor,
                interaction=self.interaction * factor,
            )
        raise ModelError(f"unknown estimand {estimand!r}")

    def describe(self) -> str:
        shape = {
            "linear": "linear in the treated share",
            "saturating": f"saturating (rate {self.saturation_rate:g})",
            "threshold": f"a threshold at a treated share of {self.threshold:g}",
        }[self.spillover_shape]
        scale = "continuous outcome" if self.kind == "continuous" else f"binary outcome ({self.link} link)"
        hetero = self.type_effect or (f"block effects {list(self.block_effects)}" if self.block_effects else "none")
        noise = f", noise SD {self.noise_sd:g}" if self.kind == "continuous" else ""
        if self.cluster_icc > 0:
            noise += f", cluster random effect (ICC {self.cluster_icc:g})"
        return (
            f"{scale}: baseline {self.baseline:g}, type effect {hetero}{noise}; direct effect "
            f"{self.direct_effect:g}, spillover {self.spillover_effect:g} with {shape}, "
            f"own-treatment x spillover interaction {self.interaction:g}"
        )
