"""The plain-text summary `cellbuild inspect` prints for one inspection result."""
from __future__ import annotations

from .prototype_match import prototype_text


def describe(result: dict) -> str:
    """A plain-text summary of one inspection result."""
    lengths = " x ".join(f"{x:.4f}" for x in result["cell_lengths"])
    angles = " ".join(f"{x:.2f}" for x in result["cell_angles"])
    formula = " ".join(f"{k} {v:,}" for k, v in result["composition"].items())
    close = result["close_pairs"]
    coordination = result["coordination"]
    lines = [
        f"{result['file']}  [{result.get('format_title', result.get('format', '?'))}, "
        f"read by {result.get('reader', '?')}]",
        f"  atoms         {result['n_atoms']:,} ({formula})",
        f"  cell          {lengths} A; angles {angles} deg; volume {result['volume']:.3f} A^3",
        f"  box widths    {' '.join(f'{w:.4f}' for w in result['perpendicular_widths'])} A "
        "(between opposite faces)",
        f"  density       {result['density']:.4f} g/cm^3",
        f"  closest pair  {result['min_distance']:.4f} A (atoms "
        f"{result['min_distance_pair'][0]} and {result['min_distance_pair'][1]}); "
        f"{close['count']} pair(s) closer than {close['threshold']:.4f} A",
        "  shells        " + (" | ".join(f"{s['distance']:.4f} A x {s['count']:g}"
                                       for s in result["shells"]) or "none found")
        + ("  (neighbours per atom)" if result["shells"] else ""),
        f"  cutoff        {coordination['cutoff']:.4f} A ({coordination['cutoff_source']})",
    ]
    for symbol, hist in coordination["by_species"].items():
        counts = ", ".join(f"{n:,} atoms with {k}" for k, n in hist.items())
        lines.append(f"  coordination  {symbol}: {counts}")
    if result.get("slab"):
        from .slab_detect import slab_text

        lines.append("  slab          " + slab_text(result["slab"]))
    lines.append("  lattice       " + _lattice_text(result))
    if result["defects"] is not None:
        lines.append("  defects       " + _defects_text(result["defects"]))
    group = result["space_group"]
    for label, order in (result.get("short_range_order") or {}).items():
        lines.append(f"  order         {label}: " + _order_text(order))
    lines.append("  space group   " + (f"{group['symbol']} ({group['number']})" if group
                                      else result.get("space_group_note", "not determined")))
    for note in result.get("warnings", []):
        lines.append(f"  warning       {note}")
    for check in result["checks"]:
        state = "passed" if check["passed"] else "FAILED"
        lines.append(f"  check         {check['name']} {state}: {check['detail']}")
    failed = [c["name"] for c in result["checks"] if not c["passed"]]
    lines.append("  result        " + ("all checks passed" if not failed
                                      else "CHECKS FAILED: " + ", ".join(failed)))
    if result.get("plot"):
        lines.append(f"  plot          {result['plot']}")
    return "\n".join(lines)


def _lattice_text(result: dict) -> str:
    info = result["lattice_match"]
    if result.get("prototype"):
        return prototype_text(result["prototype"])
    if result["lattice"] is None:
        return f"none ({info.get('reason', 'no match')})"
    return (f"{result['lattice']}, a = {info['lattice_constant']:.4f} A (most common "
            f"coordination {info['coordination']}, d2/d1 = {info['shell_ratio']:.4f}, "
            f"{info['sites']:.1f} sites for {result['n_atoms']:,} atoms, neighbour-count "
            f"misfit {info['shell_misfit'][result['lattice']]:.3f})")


def _order_text(order: dict) -> str:
    """Warren-Cowley alphas of the unlike pairs: the largest |alpha| per shell."""
    unlike = [v for pair, v in order["alpha"].items() if pair.split("-")[0] != pair.split("-")[1]]
    worst = []
    for k, r in enumerate(order["shells"]):
        values = [abs(v[k]) for v in unlike if v[k] is not None]
        worst.append(f"shell {k + 1} ({r:.4f} A) max |alpha| {max(values):.3f}" if values
                     else f"shell {k + 1} ({r:.4f} A) no pairs")
    return (f"Warren-Cowley alphas over {len(unlike)} unlike pair(s) of "
            f"{', '.join(order['concentration'])}: " + "; ".join(worst))


def _or_unknown(value) -> str:
    return "unknown" if value is None else f"{value:,}"


def _defects_text(defects: dict) -> str:
    note = f"; note: {defects['note']}" if defects.get("note") else ""
    if defects["vacancy_like"] == 0 and defects["crowded"] == 0:
        return "none inferred (every atom has the ideal coordination, none crowded)" + note
    return (f"{defects['vacancy_like']:,} vacancy-like atom(s) (about "
            f"{defects['estimated_vacancies']:g} vacancies from missing neighbours, "
            f"{_or_unknown(defects['estimated_vacancies_from_sites'])} from sites minus atoms); "
            f"{defects['crowded']:,} crowded atom(s) (more than "
            f"{defects['ideal_coordination']} neighbours or closer than "
            f"{defects['crowded_distance']:.4f} A), "
            f"{_or_unknown(defects['interstitial_like'])} of them interstitial-like "
            f"(on no lattice site){note}")

