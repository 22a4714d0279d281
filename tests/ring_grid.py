"""The ring analysis's error over the RC-damper design space, against the network's eigenvalues.

Run: ``.venv/bin/python tests/ring_grid.py [--seeds N]`` (needs ngspice). For every Rs/Z0 and
Cs/C of the grid, on a linear and on a junction-capacitance node, an ngspice turn-off record
(:mod:`ngspice_rings`: 8 bits, noise) is analysed and its damping ratio and frequency compared with
the dominant pole of the network linearised at the plateau (numpy eigenvalues of its state
matrix). Targets: for ζ ≤ 0.5, ζ within 10 % (or 0.02) and fd within 2 %; for ζ up to 0.7, ζ within
15 % and fn within 8 %. Prints one row per record, the worst error per region and the misses.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))

from ngspice_rings import NGSPICE, PLATEAU_V, RingCase, pole_figures, scope_record  # noqa: E402

from labseq.analysis import analyze_capture  # noqa: E402

RS_OVER_Z0 = (0.5, 0.7, 1.0, 1.4, 2.0, 3.0, 4.0, 10.0)
CS_OVER_C = (0.3, 0.5, 1.0, 2.0, 3.0, 5.0)


def misses(zeta: float, fit_zeta: float | None, d_fd: float, d_fn: float) -> str:
    """Which target a result misses ('' when none)."""
    if fit_zeta is None:
        return "no ring reported"
    d_zeta = fit_zeta - zeta
    if zeta <= 0.5:
        wrong = [
            "ζ" * (abs(d_zeta) > max(0.10 * zeta, 0.02)),
            "fd" * (abs(d_fd) > 0.02),
        ]
    else:
        wrong = ["ζ" * (abs(d_zeta) > 0.15 * zeta), "fn" * (abs(d_fn) > 0.08)]
    return " ".join(w for w in wrong if w)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=1, help="noise seeds per record")
    args = parser.parse_args()
    if NGSPICE is None:
        print("ngspice is not installed")
        return 1
    print(
        f"{'node':<9}{'Rs/Z0':>6}{'Cs/C':>6}{'seed':>5}{'ζ true':>8}{'ζ fit':>8}{'dζ %':>8}"
        f"{'fd MHz':>8}{'dfd %':>8}{'dfn %':>8}  model / miss"
    )
    missed = 0
    worst: dict[str, float] = {}
    cells: dict[tuple[float, float], list[float]] = {}  # (Rs/Z0, Cs/C) → |dζ|, |dfd|, |dfn|, ζ
    for junction in (False, True):
        for rs in RS_OVER_Z0:
            for cs in CS_OVER_C:
                case = RingCase(rs, cs, junction)
                pole = case.network_pole(PLATEAU_V)
                if pole.imag == 0:
                    continue  # no complex pair: nothing to compare a ζ with
                fd, fn, zeta = pole_figures(pole)
                if zeta > 0.7:
                    continue
                for seed in range(1, args.seeds + 1):
                    edge = analyze_capture(*scope_record(case, seed)).worst
                    fit_zeta, fit_fd = edge.damping_ratio, edge.ring_frequency_hz
                    d_zeta = (fit_zeta - zeta) / zeta if fit_zeta is not None else float("nan")
                    d_fd = (fit_fd - fd) / fd if fit_fd is not None else float("nan")
                    fit_fn = edge.natural_frequency_hz
                    d_fn = (fit_fn - fn) / fn if fit_fn is not None else float("nan")
                    miss = misses(zeta, fit_zeta, d_fd, d_fn)
                    missed += bool(miss)
                    region = "ζ ≤ 0.5" if zeta <= 0.5 else "ζ 0.5–0.7"
                    for name, value in (("dζ", d_zeta), ("dfd", d_fd), ("dfn", d_fn)):
                        key = f"{region} {name}"
                        worst[key] = max(worst.get(key, 0.0), abs(value))
                    cell = cells.setdefault((rs, cs), [0.0, 0.0, 0.0, 0.0])
                    for i, value in enumerate((d_zeta, d_fd, d_fn, zeta)):
                        cell[i] = max(cell[i], abs(value))
                    print(
                        f"{'junction' if junction else 'linear':<9}{rs:>6g}{cs:>6g}{seed:>5}"
                        f"{zeta:>8.3f}{fit_zeta or float('nan'):>8.3f}{100 * d_zeta:>8.2f}"
                        f"{fd / 1e6:>8.2f}{100 * d_fd:>8.2f}{100 * d_fn:>8.2f}  "
                        f"{edge.ring_model}{'  MISS ' + miss if miss else ''}"
                    )
    print("\nworst |dζ| % / |dfd| % / |dfn| % (largest true ζ) over both nodes and every seed")
    print("Rs/Z0 \\ Cs/C" + "".join(f"{cs:>24g}" for cs in CS_OVER_C))
    for rs in RS_OVER_Z0:
        row = [
            "{:>6.1f}/{:>4.1f}/{:>4.1f} ({:.2f})".format(*(100 * x for x in cells[rs, cs][:3]),
                                                      cells[rs, cs][3])
            if (rs, cs) in cells
            else "—"
            for cs in CS_OVER_C
        ]  # fmt: skip
        print(f"{rs:>12g}" + "".join(f"{text:>24}" for text in row))
    print("worst |error|: " + ", ".join(f"{k} {100 * v:.1f} %" for k, v in sorted(worst.items())))
    print(f"{missed} record(s) miss a target")
    return 0


if __name__ == "__main__":
    sys.exit(main())
