"""Which compound prototype a structure is, and which element sits on which sublattice.

The lattice match of :mod:`cellbuild.lattice_match` ignores species (rock salt
shows as sc). Here every prototype of :mod:`cellbuild.prototypes` with two or
more sublattices is tried on a structure with two or more elements, for every
way of putting the elements on the sublattices (each element on one or more
sublattices, every element used).

**Measured once.** Up to ``SAMPLE_PER_ELEMENT`` atoms of each element (seeded
draw) are centres; :func:`cellbuild.neighbours.pairs_of` lists their neighbours
out to :func:`_reach` mean spacings ``(V/N)^(1/3)``, past every prototype's
first-shell cutoff. Nearest distances and neighbours per element within any
cutoff come from these pairs (one search, whatever the candidates).

**Judged per prototype and assignment**, each component over its tolerance; the
score is the largest, and at most 1 matches:

* composition: each element's atom fraction against its sublattices' site
  fraction (relative);
* distance: the lattice constant each element implies (its median nearest
  distance over its sublattices' shortest first-shell distance) against their
  median (relative);
* coordination: per sublattice, the median over its centres of the neighbours
  of each element within its cutoff (midway between its first shell and the
  next distance, at ``a``) against the prototype's first shell, summed absolute
  differences over the ideal coordination. Medians: a few per cent of
  vacancies or substitutions leave it at 0, a random alloy on the same sites is
  off by several neighbours. An element on several sublattices has each centre
  classed with the sublattice its counts fit best, and the classes' shares are
  held against the sites' (as composition);
* site fill: atoms over the sites the volume holds at ``a``, the median of
  first-shell pair distance over ideal distance (:func:`_refined_a`).

Thermal displacements of 0.05 A rms per coordinate leave every prototype
matched; at 0.1 A the narrow gaps of C15 and Heusler after the first shell
blur and those may go unmatched (``None``, with the closest named).

**Ties.** The smallest score wins; at equal scores (to 1e-9) the prototype with
fewer sites per cell (CsCl before a Heusler with Y = Z), then the earlier table
entry, then the assignment putting the elements in the structure's type order
on the sublattices in table order (MgO written Mg first reads A=Mg B=O: rock
salt's two sublattices are equivalent).

Lengths in Angstrom.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache
from itertools import product

import numpy as np

from . import neighbours
from .prototypes import PROTOTYPES, basis, first_shells

#: Elements below this fraction of the atoms may be left out as dopants when
#: the whole composition fits no prototype (their sites then look vacant, within
#: the composition and site-fill tolerances).
MINOR_FRACTION = 0.06
#: Centre atoms drawn per element (seeded); medians of a few thousand are exact
#: for integer counts at a few per cent of defects.
SAMPLE_PER_ELEMENT = 2000
#: Largest relative error of an element's atom fraction against its site fraction.
COMPOSITION_TOLERANCE = 0.10
#: Largest relative spread of the lattice constants implied by each element.
DISTANCE_TOLERANCE = 0.06
#: Largest summed |median - ideal| neighbours per element over the coordination.
COORDINATION_TOLERANCE = 0.125
#: Atoms per site implied by the volume at ``a`` must lie within this of 1.
SITE_FILL_TOLERANCE = 0.10
#: A first shell counts as one distance when its widest pair is within this of its nearest.
_SINGLE_SHELL = 0.01


@dataclass(frozen=True)
class _Sublattice:
    """One sublattice of a reference, lengths in units of ``a``."""

    label: str
    sites: int                    # per conventional cell
    distance: float               # first-shell distance
    single: bool                  # first shell at one distance
    cutoff: float                 # midway between the shell's widest pair and the next distance
    counts: tuple[int, ...]       # neighbours on each sublattice of the reference, in order
    coordination: int


@dataclass(frozen=True)
class _Reference:
    name: str
    title: str
    order: int                    # table position (ties)
    n_basis: int
    cell_volume: float            # units of a^3
    sublattices: tuple[_Sublattice, ...]


@lru_cache(maxsize=1)
def references() -> tuple[_Reference, ...]:
    """The prototypes with two or more sublattices, their first shells from geometry."""
    found = []
    for order, proto in enumerate(PROTOTYPES.values()):
        if len(proto.sublattices) < 2:
            continue
        frac, labels = basis(proto)
        shells = first_shells(proto.cell, frac, labels)
        names = tuple(dict.fromkeys(labels))
        subs = tuple(_Sublattice(
            label, labels.count(label), shells[label].distance,
            shells[label].outer <= shells[label].distance * (1.0 + _SINGLE_SHELL),
            0.5 * (shells[label].outer + shells[label].next_distance),
            tuple(shells[label].counts.get(other, 0) for other in names),
            shells[label].coordination) for label in names)
        found.append(_Reference(proto.name, proto.title, order, len(labels),
                                abs(float(np.linalg.det(np.asarray(proto.cell)))), subs))
    return tuple(found)


def _reach() -> float:
    """Pair search radius in mean spacings: every reference's largest cutoff over
    its ideal mean spacing, with a margin for vacancies and misfit."""
    return 1.25 * max(s.cutoff / (r.cell_volume / r.n_basis) ** (1.0 / 3.0)
                      for r in references() for s in r.sublattices)


@dataclass(frozen=True)
class _Sample:
    """Neighbours of the sampled centres; pairs ordered by centre slot."""

    elements: tuple[str, ...]     # present elements, type order
    atoms: np.ndarray             # atoms of each element
    centre_element: np.ndarray    # (M,) element index of each centre, ascending
    start: np.ndarray             # (elements + 1,) first centre slot of each element
    pair_slot: np.ndarray         # (P,) centre slot
    pair_element: np.ndarray      # (P,) element index of the neighbour
    pair_d: np.ndarray            # (P,) distance, Angstrom
    nearest: np.ndarray           # (M,) nearest distance of each centre, Angstrom (inf: none)
    volume: float                 # Angstrom^3
    n_atoms: int


def _sample(structure, reach: float, near=None, per_code=None) -> _Sample:
    """Neighbours closer than ``reach`` mean spacings of up to SAMPLE_PER_ELEMENT
    seeded centres per element (``near``: the structure's Neighbourhood;
    ``per_code``: its :meth:`~cellbuild.structure.Structure.counts`, if known)."""
    per_code = structure.counts() if per_code is None else per_code
    present = np.flatnonzero(per_code)
    element_of = np.full(len(structure.symbols), -1, dtype=np.int64)
    element_of[present] = np.arange(len(present))
    rng = np.random.default_rng(0)
    drawn = []
    for code in present:  # a handful of elements
        members = np.flatnonzero(structure.species == code)
        if members.size > SAMPLE_PER_ELEMENT:
            members = np.sort(rng.choice(members, size=SAMPLE_PER_ELEMENT, replace=False))
        drawn.append(members)
    centres = np.concatenate(drawn)
    centre_element = element_of[structure.species[centres]]
    start = np.concatenate([[0], np.cumsum([len(d) for d in drawn])])
    spacing = (structure.volume / structure.n_atoms) ** (1.0 / 3.0)
    i, j, d = neighbours.pairs_of(structure.cell, structure.positions, centres,
                                  reach * spacing, near=near)
    slot_of = np.full(structure.n_atoms, -1, dtype=np.int64)
    slot_of[centres] = np.arange(len(centres))
    slot = slot_of[i]
    order = np.argsort(slot, kind="stable")
    slot, j, d = slot[order], j[order], d[order]
    nearest = np.full(len(centres), np.inf)
    np.minimum.at(nearest, slot, d)
    return _Sample(tuple(structure.symbols[c] for c in present), per_code[present],
                   centre_element, start, slot, element_of[structure.species[j]], d,
                   nearest, structure.volume, structure.n_atoms)


def _counts(sample: _Sample, e: int, r: float) -> np.ndarray:
    """(centres of element e, elements) neighbours of each element closer than r (A)."""
    lo, hi = np.searchsorted(sample.pair_slot, sample.start[e:e + 2])
    slot, other, d = (a[lo:hi] for a in (sample.pair_slot, sample.pair_element, sample.pair_d))
    m = len(sample.elements)
    n = int(sample.start[e + 1] - sample.start[e])
    close = d < r
    flat = (slot[close] - sample.start[e]) * m + other[close]
    return np.bincount(flat, minlength=n * m).reshape(n, m)


def _evaluate(ref: _Reference, mapping: tuple[int, ...], sample: _Sample) -> dict | None:
    """Score and details of ``ref`` with sublattice k holding element mapping[k]."""
    m = len(sample.elements)
    subs = ref.sublattices
    groups = [[k for k, e in enumerate(mapping) if e == el] for el in range(m)]
    sites = np.array([sum(subs[k].sites for k in g) for g in groups], dtype=np.float64)
    fraction = sample.atoms / sample.n_atoms
    composition = float(np.max(np.abs(fraction / (sites / ref.n_basis) - 1.0)))
    if composition > 3.0 * COMPOSITION_TOLERANCE:
        return None  # not worth the neighbour counts
    # each element's nearest distance sits at its sublattices' shortest first shell
    implied = np.array([
        np.median(sample.nearest[sample.start[el]:sample.start[el + 1]])
        / min(subs[k].distance for k in g) for el, g in enumerate(groups)])
    if not np.all(np.isfinite(implied)):
        return None
    a0 = float(np.median(implied))
    distance = float(np.max(np.abs(implied / a0 - 1.0)))
    a = _refined_a(ref, groups, sample, a0)
    # expected neighbours of each element, per sublattice (element space)
    expected = np.zeros((len(subs), m), dtype=np.int64)
    for k, sub in enumerate(subs):
        np.add.at(expected[k], np.array(mapping), np.array(sub.counts))
    coordination, shares, detail = 0.0, 0.0, {}
    for el, g in enumerate(groups):
        measured = {k: _counts(sample, el, subs[k].cutoff * a) for k in g}
        miss = np.stack([np.abs(measured[k] - expected[k]).sum(axis=1) for k in g])
        klass = np.array(g)[np.argmin(miss, axis=0)]
        # sublattices the counts cannot tell apart share one class
        kinds: dict[tuple, list[int]] = {}
        for k in g:
            kinds.setdefault((subs[k].cutoff, tuple(expected[k])), []).append(k)
        for same in kinds.values():
            share = float(np.isin(klass, same).mean()) if klass.size else 0.0
            want = sum(subs[k].sites for k in same) / sites[el]
            shares = max(shares, abs(share / want - 1.0))
        for k in g:
            rows = measured[k][np.isin(klass, kinds[(subs[k].cutoff, tuple(expected[k]))])]
            if rows.shape[0] == 0:
                return None
            median = np.median(rows, axis=0)
            coordination = max(coordination, float(np.abs(median - expected[k]).sum())
                               / subs[k].coordination)
            detail[k] = (el, rows, median)
    cells = sample.volume / (ref.cell_volume * a ** 3)
    fill = sample.n_atoms / (cells * ref.n_basis)
    parts = {"composition": float(max(composition, shares)), "distance": distance,
             "coordination": coordination, "site_fill": float(abs(fill - 1.0))}
    limits = {"composition": COMPOSITION_TOLERANCE, "distance": DISTANCE_TOLERANCE,
              "coordination": COORDINATION_TOLERANCE, "site_fill": SITE_FILL_TOLERANCE}
    score = max(parts[key] / limits[key] for key in parts)
    return {"ref": ref, "mapping": mapping, "score": score, "parts": parts, "a": a,
            "cells": cells, "detail": detail, "expected": expected}


def _refined_a(ref: _Reference, groups: list[list[int]], sample: _Sample, a: float) -> float:
    """The lattice constant (A) from first-shell pairs: the median of pair distance
    over ideal first-shell distance, over the centres of elements whose
    sublattices all have a first shell at one distance, the same. ``a`` (from
    nearest distances, which thermal displacements shorten) picks the pairs; two
    rounds, since a low start cuts the shell's upper tail."""
    subs = ref.sublattices
    for _ in range(2):
        ratios = []
        for el, g in enumerate(groups):
            if not all(subs[k].single for k in g) or len({subs[k].distance for k in g}) > 1:
                continue
            lo, hi = np.searchsorted(sample.pair_slot, sample.start[el:el + 2])
            d = sample.pair_d[lo:hi]
            ratios.append(d[d < subs[g[0]].cutoff * a] / subs[g[0]].distance)
        pooled = np.concatenate(ratios) if ratios else np.zeros(0)
        if pooled.size == 0:
            return a
        a = float(np.median(pooled))
    return a


def _describe(best: dict, sample: _Sample, pattern: str | None) -> dict:
    """The JSON-ready result of the winning candidate."""
    ref, mapping, elements = best["ref"], best["mapping"], sample.elements
    sublattices = {}
    for k, sub in enumerate(ref.sublattices):
        el, rows, median = best["detail"][k]
        centres = sample.start[el + 1] - sample.start[el]
        on_it = sample.atoms[el] * rows.shape[0] / centres  # share of the element's atoms
        sublattices[sub.label] = {
            "element": elements[el],
            "atoms": int(round(float(on_it))),
            "sites_expected": int(round(best["cells"] * sub.sites)),
            "coordination": {
                "cutoff": sub.cutoff * best["a"],
                "centres": int(rows.shape[0]),  # sampled atoms the numbers are over
                "mean": float(rows.sum(axis=1).mean()),
                "expected": sub.coordination,
                "by_element": {elements[e]: {"expected": int(best["expected"][k][e]),
                                             "median": float(median[e]),
                                             "mean": float(rows[:, e].mean())}
                               for e in range(len(elements))},
            },
        }
    return {"name": ref.name, "title": ref.title,
            "species": {sub.label: elements[mapping[k]] for k, sub in enumerate(ref.sublattices)},
            "lattice_constant": best["a"], "cells": best["cells"], "pattern": pattern,
            "score": best["score"], "misfit": best["parts"], "sublattices": sublattices}


def match_prototype(structure, *, pattern: str | None = None, near=None, counts=None
                    ) -> tuple[dict | None, str | None]:
    """The compound prototype ``structure`` (a :class:`~cellbuild.structure.Structure`)
    is, as a JSON-ready dict (see the module docstring), or None with a sentence
    saying why; ``pattern`` is the species-blind lattice, copied into the result.

    One-element structures are never compounds: (None, None). When all elements
    together fit no prototype, elements under ``MINOR_FRACTION`` of the atoms
    (dopants, substituents) are left out and the rest matched again; the result
    then lists them under ``minor_elements`` (element -> atoms). Before that,
    elements with the same surroundings are tried as one species on one
    sublattice (:func:`element_groups`: a high-entropy oxide's cations); a
    mixed sublattice's ``species`` then joins its elements with ``+`` and
    ``occupants`` gives its atoms per element. ``near``: the structure's
    :class:`~cellbuild.neighbourhood.Neighbourhood`, whose cell lists the sample uses;
    ``counts``: the structure's atoms per species code, when the caller has them.
    """
    counts = structure.counts() if counts is None else counts  # O(N): once, handed down
    if int(np.count_nonzero(counts)) < 2:
        return None, None
    # one neighbour search serves the match and the grouping of the same atoms
    sample = _sample(structure, _reach(), near, counts)
    found, why = _match(structure, pattern, sample)
    if found is not None:
        return found, why
    mixed = _mixed_match(structure, pattern, sample, near, counts)
    if mixed is not None:
        return mixed, None
    minor = np.flatnonzero((counts > 0) & (counts < MINOR_FRACTION * structure.n_atoms))
    if minor.size == 0 or np.count_nonzero(counts) - minor.size < 2:
        return found, why
    from .structure import Structure

    keep = ~np.isin(structure.species, minor)
    host = Structure(structure.cell, structure.positions[keep], structure.species[keep],
                     structure.symbols)
    again, _ = _match(host, pattern)
    if again is None:
        return found, why
    again["minor_elements"] = {structure.symbols[c]: int(counts[c]) for c in minor}
    return again, None


#: Elements share a sublattice when the shares of each element among their first
#: neighbours differ by less than this in sum (0 for equal surroundings, 2 for
#: surroundings with nothing in common: in rock salt each cation is surrounded by
#: oxygen alone, in an ordered L1_2 Au by Cu alone but Cu by Cu and Au).
SAME_SURROUNDINGS = 0.5
#: First neighbours: closer than this times the median nearest distance.
FIRST_SHELL_MARGIN = 1.15


def element_groups(structure, sample: _Sample | None = None) -> list[list[str]]:
    """The structure's elements grouped by their first-neighbour surroundings (see
    :data:`SAME_SURROUNDINGS`), each group in type order, groups by first member.
    ``sample``: the structure's neighbour sample, when already drawn."""
    if sample is None:
        sample = _sample(structure, _reach())
    finite = sample.nearest[np.isfinite(sample.nearest)]
    if finite.size == 0:
        return [[e] for e in sample.elements]
    r = FIRST_SHELL_MARGIN * float(np.median(finite))
    shares = []
    for e in range(len(sample.elements)):  # a handful of elements
        c = _counts(sample, e, r).sum(axis=0).astype(float)
        shares.append(c / max(c.sum(), 1.0))
    groups: list[list[int]] = []
    for e in np.argsort(-sample.atoms, kind="stable"):  # most abundant first
        home = next((g for g in groups if np.abs(shares[g[0]] - shares[e]).sum()
                     < SAME_SURROUNDINGS), None)
        if home is None:
            groups.append([int(e)])
        else:
            home.append(int(e))
    groups = sorted(sorted(g) for g in groups)
    return [[sample.elements[e] for e in g] for g in groups]


def _mixed_match(structure, pattern: str | None, sample: _Sample | None = None,
                 near=None, counts=None) -> dict | None:
    """The prototype of ``structure`` with each group of :func:`element_groups`
    taken as one species, or None when no group holds two elements or none fits.
    ``near``: the structure's Neighbourhood (the grouped atoms are the same atoms);
    ``counts``: its atoms per species code, if known."""
    from .structure import Structure

    groups = element_groups(structure, sample)
    if len(groups) < 2 or all(len(g) == 1 for g in groups):
        return None
    group_of = np.zeros(len(structure.symbols), dtype=np.int32)
    for k, g in enumerate(groups):
        group_of[[structure.symbols.index(e) for e in g]] = k
    grouped = Structure(structure.cell, structure.positions, group_of[structure.species],
                        tuple(g[0] for g in groups))
    counts = structure.counts() if counts is None else counts
    found, _ = _match(grouped, pattern, near=near,
                      counts=np.bincount(group_of, weights=counts,
                                         minlength=len(groups)).astype(np.int64))
    if found is None:
        return None
    by_first = {g[0]: g for g in groups}
    found["occupants"] = {label: {e: int(counts[structure.symbols.index(e)])
                                  for e in by_first[first]}
                          for label, first in found["species"].items() if len(by_first[first]) > 1}
    found["species"] = {label: "+".join(by_first[first]) for label, first in found["species"].items()}
    return found


def _match(structure, pattern: str | None, sample: _Sample | None = None, near=None,
           counts=None) -> tuple[dict | None, str | None]:
    """Best prototype of ``structure`` (``sample``: its neighbour sample, if drawn;
    ``near``: its Neighbourhood; ``counts``: its atoms per species code, if known)."""
    if sample is not None:
        counts = None  # the sample's elements are those present
        present = len(sample.elements)
    else:
        counts = structure.counts() if counts is None else counts
        present = int(np.count_nonzero(counts))
    if present < 2:
        return None, None
    refs = [r for r in references() if len(r.sublattices) >= present]
    if not refs:
        return None, f"no prototype has {present} sublattices"
    if sample is None:
        sample = _sample(structure, _reach(), near, counts)
    candidates = []
    for ref in refs:
        for mapping in product(range(present), repeat=len(ref.sublattices)):
            if len(set(mapping)) < present:
                continue  # every element sits somewhere
            found = _evaluate(ref, mapping, sample)
            if found is not None and math.isfinite(found["score"]):
                candidates.append(found)
    if not candidates:
        return None, "the composition fits no prototype's sites"
    best = min(candidates, key=lambda c: (round(c["score"], 9), c["ref"].n_basis,
                                          c["ref"].order, c["mapping"]))
    if best["score"] > 1.0:
        shown = ", ".join(f"{k} {v:.3f}" for k, v in best["parts"].items())
        return None, (f"closest is {best['ref'].name} with misfit {shown}, beyond the "
                      "tolerances")
    return _describe(best, sample, pattern), None


def expected_names() -> tuple[str, ...]:
    """Every prototype name :func:`match_prototype` can return."""
    return tuple(r.name for r in references())


def prototype_text(found: dict) -> str:
    """One line for the text summary: ``rocksalt A=Mg B=O, a = 4.2120 A (...)``."""
    species = " ".join(f"{label}={element}" for label, element in found["species"].items())
    coordination = ", ".join(
        f"{label} {sub['coordination']['mean']:.2f}/{sub['coordination']['expected']}"
        for label, sub in found["sublattices"].items())
    pattern = found["pattern"] or "none"
    minor = found.get("minor_elements")
    if minor:  # dopants left out of the match
        species += " with " + ", ".join(f"{n:,} {e}" for e, n in minor.items())
    return (f"{found['name']} {species}, a = {found['lattice_constant']:.4f} A "
            f"({found['title']}; {found['cells']:.1f} cells; first-shell neighbours "
            f"{coordination}; species-blind pattern {pattern}; misfit {found['score']:.3f})")
