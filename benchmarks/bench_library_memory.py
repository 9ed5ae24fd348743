"""Benchmark: peak memory and time of building one large-cell phase (not a timed test).

    python benchmarks/bench_library_memory.py [--a 20 30 40] [--limit-mb 4000]

Writes P1 CIFs of cell volume a³ (a in Å) and builds each with ``build_phase`` at d_min = 0.5 Å
in a fresh interpreter (address space capped at --limit-mb), then prints the reflections, the
rings, the peak resident memory (ru_maxrss), its growth over an interpreter that only imported
the library code, that growth per reflection, and the build time. Four kinds: one atom in a
cubic cell (many reflections per ring); one atom in a triclinic cell (a ring per Friedel pair:
the most rings per reflection); two Au atoms at 0,0,0 and ½,½,½ of a cubic cell (a hidden
I-centring: half the reflections forbidden, none lit by double diffraction); 64 atoms at
random positions (the structure-factor sum over atoms). The default library.max_reflections
is chosen from these figures (docs/library.md).
"""

from __future__ import annotations

import argparse
import json
import math
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

CHILD = """
import json, resource, sys, time
from ringid.library.store import build_phase
import gemmi, numpy
base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
t0 = time.perf_counter()
rec = {}
if sys.argv[1] != "-":
    rec = build_phase(sys.argv[1], sys.argv[2], max_reflections=int(sys.argv[3]))
print(json.dumps({"base_kb": base, "peak_kb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss,
                  "seconds": time.perf_counter() - t0, "status": rec.get("status", ""),
                  "error": rec.get("error", ""), "n_reflections": rec.get("n_reflections", 0),
                  "n_rings": rec.get("n_rings", 0)}))
"""


def cif(cell: tuple[float, ...], atoms: list[tuple[str, float, float, float]]) -> str:
    rows = "".join(f"{el}{i} {el} {x:.6f} {y:.6f} {z:.6f} 1 0.005\n" for i, (el, x, y, z) in enumerate(atoms))
    a, b, c, al, be, ga = cell
    return (f"data_p1\n_cell_length_a {a}\n_cell_length_b {b}\n_cell_length_c {c}\n"
            f"_cell_angle_alpha {al}\n_cell_angle_beta {be}\n_cell_angle_gamma {ga}\n"
            "_space_group_name_H-M_alt 'P 1'\nloop_\n_atom_site_label\n_atom_site_type_symbol\n"
            "_atom_site_fract_x\n_atom_site_fract_y\n_atom_site_fract_z\n_atom_site_occupancy\n"
            "_atom_site_U_iso_or_equiv\n" + rows)


def run(path: str, out: str, limit_mb: int) -> dict:
    def cap():
        import resource

        resource.setrlimit(resource.RLIMIT_AS, (limit_mb << 20, limit_mb << 20))

    res = subprocess.run([sys.executable, "-c", CHILD, path, out, str(10**12)], capture_output=True, text=True,
                         preexec_fn=cap, cwd=ROOT)
    if res.returncode != 0:
        return {"status": "crashed", "error": res.stderr.strip().splitlines()[-1] if res.stderr.strip() else ""}
    return json.loads(res.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--a", type=float, nargs="+", default=[20.0, 30.0, 40.0])
    parser.add_argument("--limit-mb", type=int, default=4000)
    args = parser.parse_args()

    import numpy as np

    rng = np.random.default_rng(0)
    contents = {
        "1 atom": [("Au", 0.1, 0.2, 0.3)],
        "triclinic": [("Au", 0.1, 0.2, 0.3)],
        "hidden I": [("Au", 0, 0, 0), ("Au", 0.5, 0.5, 0.5)],
        "64 atoms": [("Fe", *rng.random(3)) for _ in range(64)],
    }
    base = run("-", "-", args.limit_mb)["peak_kb"]
    print(f"interpreter with the library code imported: {base / 1024:.0f} MB")
    print(f"{'content':<10} {'a_A':>5} {'reflections':>12} {'rings':>9} {'peak_MB':>8} {'growth_MB':>9} "
          f"{'B/refl':>7} {'time_s':>7}  status")
    with tempfile.TemporaryDirectory() as tmp:
        for name, atoms in contents.items():
            for a in args.a:
                path = Path(tmp) / f"p1_{a:g}.cif"
                # triclinic: b, c and the angles chosen so that no two reflections but Friedel mates share d
                cell = (a, 1.07 * a, 1.13 * a, 83, 97, 104) if name == "triclinic" else (a, a, a, 90, 90, 90)
                cell = tuple(v * (1.07 * 1.13 * math.sin(math.radians(83))) ** (-1 / 3) if i < 3 and
                             name == "triclinic" else v for i, v in enumerate(cell))  # about the cubic volume
                path.write_text(cif(cell, atoms), encoding="utf-8")
                r = run(str(path), str(Path(tmp) / "lib"), args.limit_mb)
                n = r.get("n_reflections", 0)
                if "peak_kb" not in r:
                    print(f"{name:<10} {a:5g} {'':>12} {'':>9} {'':>8} {'':>9} {'':>7} {'':>7}  {r['status']}: "
                          f"{r['error']}")
                    continue
                growth = (r["peak_kb"] - base) * 1024
                per = growth / n if n else float("nan")
                print(f"{name:<10} {a:5g} {n:12d} {r['n_rings']:9d} {r['peak_kb'] / 1024:8.0f} "
                      f"{growth / 2**20:9.0f} {per:7.0f} {r['seconds']:7.1f}  {r['status']} {r['error']}")


if __name__ == "__main__":
    main()
