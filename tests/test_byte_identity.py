"""The files `make` writes stay byte-identical through the performance work.

The sha256 values below were recorded from the code before the performance
work of issue 17 (commit 3eb2226), for small recipes of each kind: fcc with
vacancies and a substitution, rock salt with Schottky defects, a dopant and
charges, an oriented fcc box, hcp, and the CIF-based rutile recipe of
``recipes/``. Structure files and ``NAME.defects.json`` are compared byte for
byte; ``NAME.report.json`` without its ``versions`` field (library versions
differ between machines), as canonical JSON. (Source of the expected values:
the program itself, before the change; the check is of sameness, not of
correctness, which the other tests cover against outside references.)
"""
from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pytest
import yaml

from cellbuild.pipeline import make
from cellbuild.recipe import load_recipe

RUTILE = Path(__file__).resolve().parents[1] / "recipes" / "oxides" / "rutile-oxygen-vacancy.yaml"

RECIPES = {
    "fcc": {"name": "fcc", "crystal": {"element": "Cu", "lattice": "fcc", "a": 3.615},
            "size": {"repeat": [3, 3, 3]}, "seed": 7,
            "outputs": ["lammps-data", "xyz", "cif", "poscar"],
            "defects": {"vacancies": {"count": 2},
                        "substitutions": [{"element": "Ni", "fraction": 0.1}]}},
    "rocksalt": {"name": "mgo",
                 "crystal": {"lattice": "rocksalt", "species": {"A": "Mg", "B": "O"}, "a": 4.212},
                 "size": {"repeat": [2, 2, 2]}, "seed": 3,
                 "outputs": ["lammps-data", "xyz", "cif", "poscar"],
                 "charges": {"Mg": 2, "O": -2, "Ca": 2},
                 "defects": {"schottky": {"count": 1},
                             "substitutions": [{"element": "Ca", "count": 2, "on": "A"}]}},
    "oriented": {"name": "cu111",
                 "crystal": {"element": "Cu", "lattice": "fcc", "a": 3.615,
                             "axes": {"x": [1, -1, 0], "y": [1, 1, -2], "z": [1, 1, 1]}},
                 "size": {"repeat": [2, 1, 2]}, "seed": 1,
                 "outputs": ["lammps-data", "xyz", "poscar"],
                 "defects": {"vacancies": {"count": 1}}},
    "hcp": {"name": "ti", "crystal": {"element": "Ti", "lattice": "hcp", "a": 2.951, "c": 4.686},
            "size": {"repeat": [3, 3, 2]}, "seed": 5,
            "outputs": ["lammps-data", "xyz", "cif", "poscar"],
            "defects": {"vacancies": {"count": 1}}},
}

# recorded at commit 3eb2226 (before the performance work), see the module docstring
EXPECTED = {
    'fcc': {
        'fcc.cif': '1918cb7a4ec10e9672096f52bfbd5a654f2e040a343869ae8f4c9774b478efff',
        'fcc.defects.json': '2c178c5e774b99281fd2d672fdd79107eae42cc35e1900b70038ecbf91f26bc3',
        'fcc.lmp': '9a08a321f2b273be5d1b6e1963e3060c073ae738c6fd95eae09bb9f49bbc9868',
        'fcc.report.json': 'd258e6bccc1e19b25c943113b0afa62ed7bf2dac6147c84238db87b16c1f9cfd',
        'fcc.vasp': 'b3c9a042c8445bfc21756db40c5da051f56af0f888475f8687d55b1f0dc07e66',
        'fcc.xyz': 'f919ad9677ce33f67659473384e4bf2b465642a0387826a0fe0ade57902a989e',
    },
    'rocksalt': {
        'mgo.cif': '838d83675fd0f8294c5feed1370f7748d77bb08199652dd316ec6743a39f3af3',
        'mgo.defects.json': '5d95f35b9355b91efed95de0d26df0d8cb03960aa7c41ae8cfce7413578a7b12',
        'mgo.lmp': 'ddbeb13d050174bd2d5f92abf5bbcac566238c87d4d56c4ce9b4bc94b37dce5d',
        'mgo.report.json': '69efc6ad75a0336c819e702e7dc2ec4e9f094d5afdf2c16fb1106903a06665e5',
        'mgo.vasp': 'c57bf5baaf65513424cca7d716b087486ab441d1775f2635c6b699fba993b551',
        'mgo.xyz': '9f46d9528d80e8a9b809cd45cee9247f972e58cf8f2a1841821385632bad08d8',
    },
    'oriented': {
        'cu111.defects.json': '819d05e35105c79c92fe7f588ae7020b991696c930aac11d44041a0d0371be68',
        'cu111.lmp': 'dc9c2cd02ce0502285fbd47552f98fedf75e6e3363c592de6b8df4708b8beb29',
        'cu111.report.json': '433048ced75ebbdbabec1044c77fcb7a0faddf77f097397127d36ac4d2fc2f11',
        'cu111.vasp': '8f44652709a932117e11a41bb8787e515e89d7f5092ae6f9ef991c16bf0bb8e5',
        'cu111.xyz': '942d3a06891c243f151fec7fab0792af57ca1abec1f12b7a88c7f81bf8464cf3',
    },
    'hcp': {
        'ti.cif': '6fcd62947f5c49aa58a8cda7c4a622219a56a69b63c7372a6c51b2f9c0ef25b7',
        'ti.defects.json': '7ec6622d9a61040b85ad9a40315156013701f58f1868235d0b60b015f0d2545b',
        'ti.lmp': '914c10e3fd44e6fdec0f39f2ae5ff0ca0c3a666e47e5714513ed5adcc74eb380',
        'ti.report.json': '4cc7bd14c2d0dbd52ce1f7c63fe173c5af81624f27a1c705721570ae32fd5616',
        'ti.vasp': '91a697a5140ee3d01c4bbf1e6bfc86349d7da05283a07c4c1a064da8a0a96d7a',
        'ti.xyz': '3d3ff99dc2b84b5c345f83916831d1cfca1a255f7b3a1be016c5382c315382be',
    },
    'rutile': {
        'rutile-vo.cif': 'a2c8b1d5e19c1afbe4d5805e4efe69ee0d58f5a428e9985db33a08d42b9b7a9e',
        'rutile-vo.defects.json': 'f38e19bcbdca3d8395f5f5ec44aab55c20cbfc0b598b16bea11eb59b80ec172c',
        'rutile-vo.lmp': '4b680d8ce3729ab469263639ee2296a12836590cb058b91272bb871e2b07ad40',
        'rutile-vo.report.json': 'a8f954ac5c026a13a1554d34a0f3fea5e0ff37e94432098c8e7c2e54af260055',
        'rutile-vo.vasp': 'b3ac10f21f4ddef4f1bbaf196b8c1330510128e0fc0becdee4dd37d15c5caf67',
        'rutile-vo.xyz': '8094185a6f7be1df4813dbc2ec7affde399328e7c523de871d96f6df7d5862f4',
    },
}


def digests(out: Path) -> dict[str, str]:
    """sha256 of every file in ``out`` (report.json without ``versions``)."""
    found = {}
    for path in sorted(out.iterdir()):
        data = path.read_bytes()
        if path.name.endswith(".report.json"):
            report = json.loads(data)
            report.pop("versions")
            data = json.dumps(report, sort_keys=True).encode()
        found[path.name] = hashlib.sha256(data).hexdigest()
    return found


def build(key: str, tmp_path: Path) -> dict[str, str]:
    if key == "rutile":
        recipe = load_recipe(RUTILE)
    else:
        path = tmp_path / f"{key}.yaml"
        path.write_text(yaml.safe_dump(RECIPES[key], sort_keys=False))
        recipe = load_recipe(path)
    make(recipe, tmp_path / "out", force=True)
    return digests(tmp_path / "out")


@pytest.mark.parametrize("key", [*RECIPES, "rutile"])
def test_files_are_byte_identical_to_before(key, tmp_path):
    assert build(key, tmp_path) == EXPECTED[key]


if __name__ == "__main__":  # prints EXPECTED for the code on the path
    import sys
    import tempfile

    for key in [*RECIPES, "rutile"]:
        with tempfile.TemporaryDirectory() as tmp:
            print(f"    {key!r}: {build(key, Path(tmp))!r},", file=sys.stdout)
