"""Defect requests before any placement: how many of each, and whether they fit.

Pure arithmetic on the plan (no numpy), so `cellbuild plan` can show the counts
and refuse impossible requests quickly; :mod:`cellbuild.defects` places them.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

from typing import TYPE_CHECKING

from .errors import InputError
from .recipe import Amount, Recipe

if TYPE_CHECKING:  # build imports this module to resolve the plan
    from .build import Plan
    from .crystal import Crystal


@dataclass(frozen=True)
class Request:
    """One defect request: kind, element placed (or removed), target sites
    (``on``: an element or an interstitial kind), recipe key, amount."""

    kind: str
    element: str
    on: str
    key: str
    amount: Amount


def requests(recipe: Recipe) -> list[Request]:
    """The recipe's defect requests in placement order."""
    d = recipe.defects
    out = []
    if d.vacancies:
        out.append(Request("vacancy", d.vacancies.on, d.vacancies.on, "defects.vacancies",
                           d.vacancies.amount))
    for i, s in enumerate(d.substitutions):
        out.append(Request("substitution", s.element, s.on, f"defects.substitutions[{i}]",
                           s.amount))
    for i, s in enumerate(d.interstitials):
        out.append(Request("interstitial", s.element, s.site, f"defects.interstitials[{i}]",
                           s.amount))
    return out


def round_half_up(x: float) -> int:
    """Nearest integer, halves rounded up (not to even), as users expect from 'nearest'."""
    return int(math.floor(x + 0.5))


def requested_count(amount: Amount, n_sites: int) -> int:
    """Defects asked for: the count, or the fraction of ``n_sites`` rounded to nearest."""
    if amount.count is not None:
        return amount.count
    return round_half_up(amount.fraction * n_sites)


def asked(amount: Amount) -> dict:
    """The request as given, for the report: {"count": n} or {"fraction": f}."""
    return {"count": amount.count} if amount.count is not None else {"fraction": amount.fraction}


def _pool_sizes(crystal: Crystal, n_cells: int) -> dict[str, int]:
    """Sites available to each request target before any defect is placed."""
    sizes: dict[str, int] = {}
    for element in crystal.elements:  # lattice sites, by the element on them
        sizes[element] = sizes.get(element, 0) + n_cells
    for kind in crystal.interstitial_kinds:
        sizes[kind] = crystal.site_kind.count(kind) * n_cells
    return sizes


def planned_counts(plan: Plan) -> list[tuple[Request, int]]:
    """Each request of the plan with the number of defects it will place."""
    return list(plan.defect_counts)


def count_defects(recipe: Recipe, crystal: Crystal,
                  n_cells: int) -> tuple[tuple[Request, int], ...]:
    """Each request with the number of defects it will place, in placement order;
    refuses impossible requests (called once, by :func:`cellbuild.build.resolve`)."""
    pools = _pool_sizes(crystal, n_cells)
    used: dict[str, int] = {}
    out = []
    for req in requests(recipe):
        if req.on not in pools:
            raise InputError(
                f"`{req.on}` has no sites in the perfect crystal",
                key=f"{req.key}.on", value=req.on,
                hint="sites can be taken from " + ", ".join(pools),
                file=recipe.source)
        n = requested_count(req.amount, pools[req.on])
        left = pools[req.on] - used.get(req.on, 0)
        if n > left:
            what = "count" if req.amount.count is not None else "fraction"
            raise InputError(
                f"asks for {n:,} sites but only {left:,} {req.on} sites are left",
                key=f"{req.key}.{what}", value=req.amount.count if what == "count" else req.amount.fraction,
                hint=f"at most {left:,} can be placed", file=recipe.source)
        used[req.on] = used.get(req.on, 0) + n
        out.append((req, n))
    _refuse_empty(recipe, crystal.n_basis * n_cells, out)
    return tuple(out)


def _refuse_empty(recipe: Recipe, n_sites: int, counts: list[tuple[Request, int]]) -> None:
    """A structure needs at least one atom: refuse requests that remove every atom."""
    removed = sum(n for req, n in counts if req.kind == "vacancy")
    added = sum(n for req, n in counts if req.kind == "interstitial")
    if n_sites - removed + added < 1:
        req = next(req for req, _ in counts if req.kind == "vacancy")
        what = "count" if req.amount.count is not None else "fraction"
        raise InputError(
            "would remove every atom of the structure", key=f"{req.key}.{what}",
            value=req.amount.count if what == "count" else req.amount.fraction,
            hint=f"leave at least one of the {n_sites:,} sites occupied",
            file=recipe.source)
