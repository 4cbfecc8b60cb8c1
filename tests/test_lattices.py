"""Lattice geometry against textbook values.

Check values: geometry of touching hard spheres, as derived in any solid-state
text (Kittel, Introduction to Solid State Physics, ch. 1; Callister, Materials
Science and Engineering, ch. 3). Space-group numbers: International Tables for
Crystallography, Vol. A, found independently from coordinates by spglib.
"""
from __future__ import annotations

import math

import numpy as np
import pytest

from cellbuild.audit import spacegroup
from cellbuild.build import replicate
from cellbuild.crystal import resolve_crystal
from cellbuild.lattices import LATTICES, packing_fraction, shells, touching_radius_factor

# (atoms per conventional cell, nearest-neighbour distance / a, coordination,
#  packing fraction, space group number) -- Kittel ch. 1 / Callister ch. 3; ITA Vol. A
TEXTBOOK = {
    "sc": (1, 1.0, 6, math.pi / 6, 221),
    "bcc": (2, math.sqrt(3) / 2, 8, math.pi * math.sqrt(3) / 8, 229),
    "fcc": (4, 1 / math.sqrt(2), 12, math.pi * math.sqrt(2) / 6, 225),
    "diamond": (8, math.sqrt(3) / 4, 4, math.pi * math.sqrt(3) / 16, 227),
}

# Neighbour shells, distance in units of a: count (derived from the lattice
# vectors; common practice)
SHELLS = {
    "sc": [(1.0, 6), (math.sqrt(2), 12), (math.sqrt(3), 8)],
    "bcc": [(math.sqrt(3) / 2, 8), (1.0, 6), (math.sqrt(2), 12), (math.sqrt(11) / 2, 24)],
    "fcc": [(1 / math.sqrt(2), 12), (1.0, 6), (math.sqrt(1.5), 24), (math.sqrt(2), 12)],
    "diamond": [(math.sqrt(3) / 4, 4), (1 / math.sqrt(2), 12), (math.sqrt(11) / 4, 12)],
}

# Radius to lattice constant for touching spheres (textbook geometry):
# SC a = 2r; BCC a = 4r/sqrt(3); FCC a = 2 sqrt(2) r; diamond a = 8r/sqrt(3)
RADIUS_TO_A = {"sc": 2.0, "bcc": 4 / math.sqrt(3), "fcc": 2 * math.sqrt(2),
               "diamond": 8 / math.sqrt(3)}


@pytest.mark.parametrize("name", TEXTBOOK)
def test_basis_size_shells_and_packing_match_textbook(name):
    z, nn, cn, pf, _ = TEXTBOOK[name]
    assert LATTICES[name].n_basis == z
    assert shells(name).nearest == pytest.approx(nn, rel=1e-12)
    assert shells(name).coordination == cn
    assert packing_fraction(name) == pytest.approx(pf, rel=1e-12)


@pytest.mark.parametrize("name", SHELLS)
def test_neighbour_shells_match_lattice_vector_geometry(name):
    got = shells(name)
    for (d, n), gd, gn in zip(SHELLS[name], got.distances, got.counts):
        assert gd == pytest.approx(d, rel=1e-12)
        assert gn == n


@pytest.mark.parametrize("name", RADIUS_TO_A)
def test_touching_radius_relation(name):
    assert 1 / touching_radius_factor(name) == pytest.approx(RADIUS_TO_A[name], rel=1e-12)


@pytest.mark.parametrize("name", TEXTBOOK)
def test_spglib_finds_the_space_group_of_the_built_cell(name):
    # spglib (reference library) works from the coordinates we build
    for repeat in [(1, 1, 1), (2, 3, 2)]:
        s = replicate(resolve_crystal(name, 4.0, (("A", "Cu"),)), repeat, symbols=("Cu",))
        assert spacegroup(s)[1] == TEXTBOOK[name][4]


# Interstitial sites per conventional cell (common practice, any physical
# metallurgy text): fcc octahedral 4, tetrahedral 8; bcc octahedral 6,
# tetrahedral 12; sc cube centre 1.
@pytest.mark.parametrize("name,kind,count", [
    ("fcc", "octahedral", 4), ("fcc", "tetrahedral", 8),
    ("bcc", "octahedral", 6), ("bcc", "tetrahedral", 12), ("sc", "cube-centre", 1)])
def test_interstitial_site_counts(name, kind, count):
    sites = np.array(LATTICES[name].interstitials[kind])
    assert len(sites) == count
    assert len(np.unique(np.round(sites % 1.0, 9), axis=0)) == count
