"""The picture of an inspection: g(r) with its shells, and coordination per species.

One PNG with two panels. Left: the radial distribution function g(r) from the
pair distances (neighbours per atom in each spherical shell over the number an
ideal gas of the same density would put there), with the neighbour shells that
were found and the coordination cutoff marked. Right: how many atoms of each
species have each coordination, as grouped bars. Species colours come from
matplotlib's qualitative ``tab10`` palette in species order.

matplotlib is imported inside the function with the non-interactive Agg
backend: no display is needed and ``cellbuild --help`` stays fast.
"""
from __future__ import annotations

import os

import numpy as np

from .fileio import atomic_writer

#: Histogram bin width for g(r), in mean interatomic spacings (V/N)^(1/3).
G_BIN_FRACTION = 1.0 / 150.0
#: Figure size (inches) and resolution (dots per inch).
FIGURE_SIZE = (11.0, 4.2)
DPI = 110


def plot_inspection(result: dict, distribution, path: str | os.PathLike) -> None:
    """Write the figure for ``result`` (from :func:`cellbuild.inspection.analyse`) to
    ``path`` as PNG, atomically.

    Args:
        result: the inspection result (shells, coordination, lattice, file).
        distribution: the :class:`~cellbuild.inspection.PairDistribution` it was made from.
        path: the PNG file to write.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    figure, (left, right) = plt.subplots(1, 2, figsize=FIGURE_SIZE,
                                         gridspec_kw={"width_ratios": [3, 2]})
    try:
        _pair_panel(left, result, distribution)
        _coordination_panel(right, result, matplotlib.colormaps["tab10"])
        lattice = result.get("lattice") or "no cubic lattice"
        figure.suptitle(f"{os.path.basename(str(result['file']))}: {result['n_atoms']:,} atoms, "
                        f"{lattice}", fontsize=11)
        figure.tight_layout()
        with atomic_writer(path) as handle:
            figure.savefig(handle, format="png", dpi=DPI)
    finally:
        plt.close(figure)


def _pair_panel(axes, result: dict, distribution) -> None:
    spacing = (1.0 / distribution.number_density) ** (1.0 / 3.0)
    r, g = distribution.g(spacing * G_BIN_FRACTION)
    axes.plot(r, g, color="0.15", linewidth=1.0, label="g(r)")
    top = float(g.max()) if g.size and g.max() > 0 else 1.0
    for k, shell in enumerate(result["shells"], start=1):
        axes.axvline(shell["distance"], color="tab:blue", linestyle="--", linewidth=0.8,
                     label="shells found" if k == 1 else None)
        axes.annotate(f"{k}: {shell['count']:g}", (shell["distance"], top * 1.02),
                      ha="center", fontsize=7, color="tab:blue")
    cutoff = result["coordination"]["cutoff"]
    axes.axvline(cutoff, color="tab:red", linestyle=":", linewidth=1.2,
                 label=f"cutoff {cutoff:.3f} A")
    axes.set_xlim(0.0, distribution.r_max)
    axes.set_ylim(0.0, top * 1.12)
    axes.set_xlabel("r (Angstrom)")
    axes.set_ylabel("g(r)")
    axes.set_title("pair distribution (shell: neighbours per atom)", fontsize=9)
    axes.legend(fontsize=8, loc="upper left")


def _coordination_panel(axes, result: dict, palette) -> None:
    by_species = result["coordination"]["by_species"]
    values = sorted({int(k) for hist in by_species.values() for k in hist})
    if not values:
        axes.text(0.5, 0.5, "no atoms", ha="center", va="center", transform=axes.transAxes)
        return
    x = np.arange(len(values))
    width = 0.8 / max(1, len(by_species))
    for k, (symbol, hist) in enumerate(by_species.items()):
        heights = [hist.get(str(v), 0) for v in values]
        axes.bar(x + (k - (len(by_species) - 1) / 2) * width, heights, width,
                 color=palette(k % palette.N), label=symbol)
    axes.set_xticks(x, [str(v) for v in values])
    axes.set_xlabel(f"neighbours within {result['coordination']['cutoff']:.3f} A")
    axes.set_ylabel("atoms")
    axes.set_title("coordination per species", fontsize=9)
    axes.legend(fontsize=8)
