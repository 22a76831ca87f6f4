"""The families of the ladder by name, and the ladder's plan of (family, size) rungs."""

from __future__ import annotations

from pixelfit.errors import TrainingError
from pixelfit.families._base import Family
from pixelfit.families.constant import ConstantFamily
from pixelfit.families.logistic import LogisticFamily
from pixelfit.families.lut import LutFamily
from pixelfit.families.memorize import MemorizeFamily
from pixelfit.families.mlp import MlpFamily
from pixelfit.families.nb import NaiveBayesFamily
from pixelfit.families.tree import TreeFamily

#: Every family, in ladder order (roughly: smallest rules first).
FAMILIES: dict[str, Family] = {f.name: f for f in (ConstantFamily(), LutFamily(), NaiveBayesFamily(),
                                                  LogisticFamily(), TreeFamily(), MlpFamily(), MemorizeFamily())}
FAMILY_ORDER = tuple(FAMILIES)


def parse_families(text: str | None) -> list[str]:
    """Family names from a comma-separated list (None: all), in ladder order."""
    if text is None or text.strip() in ("", "all"):
        return list(FAMILY_ORDER)
    names = [t.strip() for t in text.split(",") if t.strip()]
    unknown = [n for n in names if n not in FAMILIES]
    if unknown:
        word = "family" if len(unknown) == 1 else "families"
        raise TrainingError(f"unknown {word} {', '.join(unknown)}; choose from {', '.join(FAMILY_ORDER)}")
    return [f for f in FAMILY_ORDER if f in names]


def parse_size_overrides(items: list[str] | None) -> dict[str, list[int]]:
    """``FAMILY=1,2,5`` items into {family: sizes}."""
    out: dict[str, list[int]] = {}
    for item in items or []:
        fam, sep, rest = item.partition("=")
        fam = fam.strip()
        if not sep or fam not in FAMILIES:
            raise TrainingError(f"sizes are given as FAMILY=LIST with a family from {', '.join(FAMILY_ORDER)}; got {item!r}",
                                field="sizes")
        try:
            sizes = sorted({int(s) for s in rest.split(",") if s.strip()})
        except ValueError:
            raise TrainingError(f"sizes {item!r}: sizes must be whole numbers", field="sizes") from None
        if not sizes or min(sizes) < 1:
            raise TrainingError(f"sizes {item!r}: give at least one size, each at least 1", field="sizes")
        out[fam] = sizes
    return out


def plan_rungs(families: list[str], n_pixels: int, max_size: int | None = None,
               overrides: dict[str, list[int]] | None = None) -> list[tuple[str, int]]:
    """(family, size) pairs of the ladder, smallest first within each family.

    ``max_size`` caps every size axis except the two fixed ends (constant and memorize).
    """
    if max_size is not None and max_size < 1:
        raise TrainingError(f"the largest size must be at least 1 (sizes count from 1), not {max_size}",
                            field="max_size")
    overrides = overrides or {}
    rungs: list[tuple[str, int]] = []
    for name in families:
        fam = FAMILIES[name]
        if fam.fixed_size:
            rungs.append((name, fam.default_sizes(n_pixels)[0]))
            continue
        sizes = overrides.get(name, fam.default_sizes(n_pixels))
        if fam.sized_in_pixels:
            too_big = [s for s in sizes if s > n_pixels]
            if too_big:
                raise TrainingError(f"{name} size {too_big[0]} is larger than the {n_pixels} pixels of a patch")
        if max_size is not None:
            sizes = [s for s in sizes if s <= max_size]
        rungs.extend((name, s) for s in sizes)
    return rungs
