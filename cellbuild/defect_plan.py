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
    """One defect request, its target resolved against the crystal.

    Attributes:
        kind: ``vacancy``, ``substitution``, ``antisite`` or ``interstitial``.
        element: the element placed (vacancies: the element removed).
        on: the target as written: a sublattice label, an element or an
            interstitial kind.
        key: the recipe key of the request, for messages and the report.
        amount: how many, as asked.
        host: the element on the target sites in the perfect crystal (None on
            interstitial sites).
        sites: indices into ``Crystal.site_frac`` of the target sites of a cell.
    """

    kind: str
    element: str
    on: str
    key: str
    amount: Amount
    host: str | None = None
    sites: tuple[int, ...] = ()


def target_sites(crystal: Crystal, on: str, key: str,
                 source: str | None = None) -> tuple[str | None, tuple[int, ...]]:
    """(host element, grid sites of a cell) of target ``on``: an interstitial kind,
    a sublattice label (a label wins over an element of the same spelling: ``B``
    of rock salt, not boron) or an element on the lattice sites. ``key`` is the
    recipe key named when the crystal has no such sites."""
    if on in crystal.interstitial_kinds:
        return None, tuple(i for i, k in enumerate(crystal.site_kind) if k == on)
    if on in crystal.sublattice:
        sites = tuple(i for i, lb in enumerate(crystal.sublattice) if lb == on)
        return crystal.elements[sites[0]], sites
    if on in crystal.elements:
        return on, tuple(i for i, e in enumerate(crystal.elements) if e == on)
    labels = ", ".join(f"{lb} ({e})" for lb, e in dict(zip(crystal.sublattice,
                                                           crystal.elements)).items())
    kinds = crystal.interstitial_kinds
    raise InputError(
        f"`{on}` has no sites in the perfect crystal", key=key, value=on,
        hint=f"sublattices {labels}" + (f"; interstitial sites {', '.join(kinds)}" if kinds else ""),
        file=source)


def requests(recipe: Recipe, crystal: Crystal) -> list[Request]:
    """The recipe's defect requests in placement order: vacancies, Schottky
    defects, substitutions, antisites, interstitials (each in recipe order)."""
    d, src = recipe.defects, recipe.source
    out = []
    for i, vac in enumerate(d.vacancies):
        key = d.vacancy_key(i)
        host, sites = target_sites(crystal, vac.on, f"{key}.on", src)
        _refuse_interstitial(host, vac.on, f"{key}.on", src)
        out.append(Request("vacancy", host, vac.on, key, vac.amount, host, sites))
    if d.schottky is not None:
        out += _schottky(crystal, d.schottky.count)
    for i, sub in enumerate(d.substitutions):
        key = f"defects.substitutions[{i}]"
        host, sites = target_sites(crystal, sub.on, f"{key}.on", src)
        _refuse_interstitial(host, sub.on, f"{key}.on", src)
        if host == sub.element:
            raise InputError(f"substitutes `{sub.on}` ({host}) by itself", key=f"{key}.element",
                             value=sub.element, hint="name another element", file=src)
        out.append(Request("substitution", sub.element, sub.on, key, sub.amount, host, sites))
    for i, anti in enumerate(d.antisites):
        key = f"defects.antisites[{i}]"
        (h0, s0), (h1, s1) = (target_sites(crystal, t, f"{key}.pair[{j}]", src)
                              for j, t in enumerate(anti.pair))
        for j, h in enumerate((h0, h1)):
            _refuse_interstitial(h, anti.pair[j], f"{key}.pair[{j}]", src)
        if h0 == h1:
            raise InputError(f"swaps {h0} with {h1}, which changes nothing", key=f"{key}.pair",
                             value=list(anti.pair), hint="name sites of two different elements",
                             file=src)
        amount = Amount(count=anti.count)
        out.append(Request("antisite", h1, anti.pair[0], key, amount, h0, s0))
        out.append(Request("antisite", h0, anti.pair[1], key, amount, h1, s1))
    for i, ins in enumerate(d.interstitials):
        key = f"defects.interstitials[{i}]"
        _, sites = target_sites(crystal, ins.site, f"{key}.site", src)
        out.append(Request("interstitial", ins.element, ins.site, key, ins.amount, None, sites))
    return out


def _refuse_interstitial(host: str | None, on: str, key: str, source: str | None) -> None:
    if host is None:
        raise InputError(f"`{on}` is an interstitial site, empty in the perfect crystal",
                         key=key, value=on, hint="name a sublattice label or an element", file=source)


def occupancy_requests(crystal: Crystal, n_cells: int) -> list[Request]:
    """A CIF's partial occupancies as exact counts, placed before the recipe's defects.

    On each label's ``N`` sites in the supercell, each occupant's share (and the
    vacant share, one minus their sum, when positive; shares summing above 1 by
    rounding are scaled to 1) gets ``floor(share * N)`` sites, and the sites
    left go one each to the largest remainders (ties: elements in sorted order,
    vacancies last): the counts sum to ``N`` exactly. The majority element holds
    the label's sites in the perfect crystal; the others arrive as substitutions
    and the vacant share as vacancies, all with key ``crystal.cif``.
    """
    out = []
    for label, occupants in crystal.occupancy:
        host = crystal.elements[crystal.sublattice.index(label)]
        sites = tuple(i for i, lb in enumerate(crystal.sublattice) if lb == label)
        shares = [(e, q) for e, q in occupants]
        total = sum(q for _, q in shares)
        if total < 1.0 - 1e-9:
            shares.append((None, 1.0 - total))
        else:
            shares = [(e, q / total) for e, q in shares]
        counts = largest_remainder([q for _, q in shares], len(sites) * n_cells)
        for (element, _), n in zip(shares, counts):
            if element == host or n == 0:
                continue
            kind = "vacancy" if element is None else "substitution"
            out.append(Request(kind, element or host, label, "crystal.cif", Amount(count=n),
                               host, sites))
    return out


def largest_remainder(shares: list[float], n: int) -> list[int]:
    """Whole counts summing to ``n`` in proportion to ``shares`` (summing to 1):
    floors first, then one more each for the largest remainders, earlier first on ties."""
    exact = [q * n for q in shares]
    counts = [int(math.floor(x + 1e-9)) for x in exact]
    left = n - sum(counts)
    order = sorted(range(len(shares)), key=lambda i: (-(exact[i] - counts[i]), i))
    for i in order[:max(left, 0)]:
        counts[i] += 1
    return counts


def schottky_units(crystal: Crystal) -> dict[str, int]:
    """Vacancies per Schottky defect on each sublattice: its sites per cell over the
    greatest common divisor of all (the stoichiometric ratio: spinel 1 : 2 : 4)."""
    per_label: dict[str, int] = {}
    for label in crystal.sublattice:
        per_label[label] = per_label.get(label, 0) + 1
    g = math.gcd(*per_label.values())
    return {label: n // g for label, n in per_label.items()}


def _schottky(crystal: Crystal, count: int) -> list[Request]:
    out = []
    for label, n in schottky_units(crystal).items():
        host, sites = target_sites(crystal, label, "defects.schottky")
        out.append(Request("vacancy", host, label, "defects.schottky", Amount(count=count * n),
                           host, sites))
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


def planned_counts(plan: Plan) -> list[tuple[Request, int]]:
    """Each request of the plan with the number of defects it will place."""
    return list(plan.defect_counts)


def count_defects(recipe: Recipe, crystal: Crystal,
                  n_cells: int) -> tuple[tuple[Request, int], ...]:
    """Each request with the number of defects it will place, in placement order;
    refuses impossible requests (called once, by :func:`cellbuild.build.resolve`).

    Requests may share sites (``on: A`` and ``on: Mg`` of rock salt): a request
    counts as free only the sites no earlier request can have taken, so a request
    accepted here always finds its sites (exact when targets are equal or disjoint).
    """
    out: list[tuple[Request, int]] = []
    for req in occupancy_requests(crystal, n_cells) + requests(recipe, crystal):
        pool = len(req.sites) * n_cells
        n = requested_count(req.amount, pool)
        mine = set(req.sites)
        left = pool - sum(min(m, len(mine.intersection(r.sites)) * n_cells) for r, m in out)
        if n > max(left, 0):
            what = "count" if req.amount.count is not None else "fraction"
            value = req.amount.count if what == "count" else req.amount.fraction
            if req.key == "defects.schottky":
                what, value = "count", recipe.defects.schottky.count
            raise InputError(
                f"asks for {n:,} sites but only {max(left, 0):,} {req.on} sites are left",
                key=f"{req.key}.{what}", value=value,
                hint=f"at most {max(left, 0):,} can be placed", file=recipe.source)
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
