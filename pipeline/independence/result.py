"""The one result type every test returns."""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    import pandas as pd

__all__ = ["CITestResult", "decide", "effect_r_of", "with_effect_r"]


@dataclass(frozen=True)
class CITestResult:
    """One test of ``x`` independent of ``y`` given ``given``.

    ``pvalue`` is always the raw p-value of the test; ``independent`` is the decision after the
    data-sufficiency policy (``policy``) was applied, so the two can disagree only when
    ``policy_applied`` is true.
    """

    x: str
    y: str
    given: tuple[str, ...]
    statistic: float
    dof: int
    pvalue: float
    n: int
    method: str
    cmi_bits: float
    cramers_v: float
    sparse: bool
    degenerate: bool
    independent: bool
    policy: str
    policy_applied: bool
    permutations: int = 0
    correction: str = "none"  # what was done about serial dependence (see independence.mixed)
    n_effective: float = float("nan")  # rows after that correction; NaN: the same as n

    @property
    def effect_r(self) -> float:
        """Partial-association effect comparable across methods: ``sqrt(1 - 2 ** (-2 * cmi_bits))``
        (the partial correlation a Gaussian pair with this much information would have)."""
        return float(effect_r_of(self.cmi_bits))

    @property
    def flags(self) -> tuple[str, ...]:
        """Words that say what is shaky about this test."""
        out = []
        if self.sparse:
            out.append("sparse")
        if self.degenerate:
            out.append("degenerate")
        if self.policy_applied:
            out.append(f"policy:{self.policy}")
        return tuple(out)

    def to_dict(self) -> dict[str, Any]:
        """Plain-data form (the conditioning set as a list)."""
        d = asdict(self)
        d["given"] = list(self.given)
        return d


def decide(pvalue: float, alpha: float, sparse: bool, policy: str) -> tuple[bool, bool]:
    """(independent, policy_applied): ``pvalue > alpha``, unless the table is sparse and the data-sufficiency
    policy (``independent`` or ``dependent``; ``flag`` keeps the p-value's word) decides otherwise."""
    independent = pvalue > alpha
    if sparse and policy != "flag":
        decided = policy == "independent"
        return decided, decided != independent
    return independent, False


def with_effect_r(frame: pd.DataFrame) -> pd.DataFrame:
    """`frame` with ``effect_r`` beside ``cmi_bits``: the partial correlation a Gaussian pair with that much
    information would have, ``sqrt(1 - 2 ** (-2 * bits))``, an effect size read the same way whichever
    test ran (G-test, chi-square, permutation or residual covariance)."""
    if "cmi_bits" not in frame.columns or "effect_r" in frame.columns:
        return frame
    out = frame.copy(deep=False)  # copy-on-write: the columns are shared, not copied (tests.parquet is large)
    out.insert(list(frame.columns).index("cmi_bits") + 1, "effect_r", effect_r_of(frame["cmi_bits"].to_numpy(dtype="float64")))
    return out


def effect_r_of(bits: Any) -> Any:
    """``sqrt(1 - 2 ** (-2 * bits))`` of a number or an array of CMI bits (NaN stays NaN): the partial
    correlation a Gaussian pair with that much information would have."""
    import numpy as np

    return np.sqrt(np.clip(1.0 - 2.0 ** (-2.0 * np.asarray(bits, dtype=np.float64)), 0.0, 1.0))
