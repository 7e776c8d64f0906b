"""Background knowledge: pairs that must stay linked, pairs that must not, and tiers."""

from __future__ import annotations

import difflib
from dataclasses import dataclass, field
from typing import Iterable, Sequence

from ..errors import ConfigError
from ..pairs import pair_key

__all__ = ["Knowledge"]


_pair = pair_key


@dataclass(frozen=True)
class Knowledge:
    """What experts know before the data speak.

    ``required`` pairs are never removed (their tests still run, so the report can say when the
    data disagreed); ``forbidden`` pairs (from the configuration) are removed before any test and
    never tested; ``rejected`` pairs (a reviewer's ``reject``) are tested as usual and removed when
    the search ends, so the report can say when the data disagree with the reviewer; ``tiers``
    order the signals: an earlier tier cannot be caused by a later one.
    """

    required: frozenset[tuple[str, str]] = frozenset()
    forbidden: frozenset[tuple[str, str]] = frozenset()
    rejected: frozenset[tuple[str, str]] = frozenset()
    tiers: tuple[tuple[str, ...], ...] = ()
    sources: dict[tuple[str, str], str] = field(default_factory=dict)

    @classmethod
    def build(
        cls,
        names: Sequence[str],
        required: Iterable[Sequence[str]] = (),
        forbidden: Iterable[Sequence[str]] = (),
        tiers: Iterable[Sequence[str]] = (),
        sources: dict[tuple[str, str], str] | None = None,
        rejected: Iterable[Sequence[str]] = (),
    ) -> "Knowledge":
        """Validate names against the data's signals and build the knowledge."""
        known = set(names)

        def check(name: str, where: str) -> str:
            if name not in known:
                close = difflib.get_close_matches(name, list(known), n=3)
                hint = f" (did you mean {', '.join(f'`{c}`' for c in close)}?)" if close else ""
                raise ConfigError(
                    f"`{where}` names the signal `{name}`, which is not among the kept columns{hint}; "
                    "fix the name or check why the column was dropped (cleaning.json)."
                )
            return name

        req = frozenset(_pair(check(a, "knowledge.required"), check(b, "knowledge.required")) for a, b in required)
        forb = frozenset(
            _pair(check(a, "knowledge.forbidden"), check(b, "knowledge.forbidden")) for a, b in forbidden
        )
        rej = frozenset(
            _pair(check(a, "knowledge.review_file"), check(b, "knowledge.review_file")) for a, b in rejected
        ) - forb  # a pair the configuration forbids is never tested, whatever the reviewer says
        both = req & forb
        if both:
            a, b = sorted(both)[0]
            raise ConfigError(f"The pair `{a}` - `{b}` is both required and forbidden; keep one.")
        both = req & rej
        if both:
            a, b = sorted(both)[0]
            raise ConfigError(
                f"The pair `{a}` - `{b}` is both required (or confirmed) and rejected in the review file; keep one."
            )
        tier_t = tuple(tuple(check(n, "knowledge.tiers") for n in t) for t in tiers)
        seen: set[str] = set()
        for t in tier_t:
            for n in t:
                if n in seen:
                    raise ConfigError(f"`knowledge.tiers` lists `{n}` in more than one tier; keep one.")
                seen.add(n)
        return cls(required=req, forbidden=forb, rejected=rej, tiers=tier_t, sources=dict(sources or {}))

    def tier_of(self, name: str) -> int | None:
        """Index of the tier holding `name`, or None."""
        for i, t in enumerate(self.tiers):
            if name in t:
                return i
        return None

    def is_required(self, a: str, b: str) -> bool:
        """True when the pair must stay linked."""
        return _pair(a, b) in self.required

    def is_forbidden(self, a: str, b: str) -> bool:
        """True when the pair must not be linked and is never tested."""
        return _pair(a, b) in self.forbidden

    def is_rejected(self, a: str, b: str) -> bool:
        """True when a reviewer rejected the pair: tested as usual, removed at the end."""
        return _pair(a, b) in self.rejected
