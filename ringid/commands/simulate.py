"""``ringid simulate``: write a synthetic ring pattern of a library phase as a TIFF.

    ringid simulate --phase Au --library LIB --camera-constant-a-px 1000 -o au.tif
    ringid simulate --pyfai-calibrant Au --camera-length-mm 400 --pixel-size-um 30 -o au.tif

The true geometry goes to ``--truth-json`` (default: the TIFF path with ``.json``),
so that a demo or a test can compare what was recovered with what was drawn.
"""

from __future__ import annotations


def add_parser(subparsers, name: str, help_text: str) -> None:
    p = subparsers.add_parser(name, help=help_text, description=help_text)
    src = p.add_mutually_exclusive_group(required=True)
    src.add_argument("--phase", metavar="PHASE", help="phase id in the library (needs --library)")
    src.add_argument("--pyfai-calibrant", metavar="NAME", help="use pyFAI's calibrant d-spacing table NAME (e.g. Au)")
    p.add_argument("--library", metavar="LIB", help="phase library folder")
    p.add_argument("-o", "--output", required=True, metavar="TIFF", help="image to write")
    p.add_argument("--truth-json", metavar="JSON", help="where to write the true geometry (default: OUTPUT.json)")
    p.add_argument("--camera-constant-a-px", "--camera-constant-A-px", dest="camera_constant_A_px", type=float,
                   metavar="K", help="camera constant in Å·px")
    p.add_argument("--camera-length-mm", type=float, metavar="L", help="camera length in mm (with --pixel-size-um)")
    p.add_argument("--pixel-size-um", type=float, metavar="P", help="detector pixel size in µm")
    p.add_argument("--voltage-kv", type=float, default=200.0, metavar="V", help="accelerating voltage (default 200)")
    p.add_argument("--shape", type=int, nargs=2, default=(2048, 2048), metavar=("NY", "NX"),
                   help="image size in pixels (default 2048 2048)")
    p.add_argument("--center-x-px", type=float, metavar="X", help="pattern centre column (default: image centre)")
    p.add_argument("--center-y-px", type=float, metavar="Y", help="pattern centre row (default: image centre)")
    p.add_argument("--ellipticity", type=float, default=0.0, metavar="EPS", help="1 - b/a (default 0)")
    p.add_argument("--ellipse-angle-deg", type=float, default=0.0, metavar="DEG", help="major-axis angle from +x")
    p.add_argument("--instrument-fwhm-per-nm", type=float, default=0.05, metavar="W",
                   help="instrumental ring FWHM in 1/nm (default 0.05)")
    p.add_argument("--crystallite-size-nm", type=float, metavar="D", help="Scherrer broadening for this size")
    p.add_argument("--n-grains", type=int, metavar="N", help="grains per ring (spotty rings)")
    p.add_argument("--texture-strength", type=float, default=0.0, metavar="S", help="two-fold azimuthal modulation")
    p.add_argument("--dose", type=float, default=1.0, metavar="F", help="count scale before Poisson noise")
    p.add_argument("--beam-stop", action="store_true", help="add a beam-stop shadow")
    p.add_argument("--beam-stop-angle-deg", type=float, default=300.0, metavar="DEG", help="rod direction")
    p.add_argument("--hot-pixel-fraction", type=float, default=0.0, metavar="F",
                   help="share of pixels made hot: 20× their counts plus an offset, clipped at saturation (default 0)")
    p.add_argument("--dead-pixel-fraction", type=float, default=0.0, metavar="F",
                   help="share of pixels that read 0 (default 0)")
    p.add_argument("--dtype", choices=("uint16", "float32"), default="uint16")
    p.add_argument("--seed", type=int, default=0, help="random seed (equal seeds give equal images)")
    p.set_defaults(func=run)


def run(args) -> int:
    import numpy as np
    import tifffile

    from ringid.core.atomic import atomic_path, write_json
    from ringid.core.errors import RingidError
    from ringid.synthetic.simulate import simulate_pattern
    from ringid.core.units import nominal_camera_constant_a_px

    if args.phase:
        if not args.library:
            raise RingidError(None, "--phase needs --library")
        from ringid.library.store import read_phase_rings

        rings = read_phase_rings(args.library, args.phase)
        d, inten, source = rings.d_angstrom, rings.intensity, f"library {args.library}, phase {args.phase}"
    else:
        from ringid.calibration.calibrate import pyfai_calibrant_rings

        d, _, _ = pyfai_calibrant_rings(args.pyfai_calibrant)
        inten = np.full(d.size, 50.0)
        source = f"pyFAI calibrant table {args.pyfai_calibrant} (equal intensities)"
    if args.camera_constant_A_px:
        k = args.camera_constant_A_px
    elif args.camera_length_mm and args.pixel_size_um:
        k = nominal_camera_constant_a_px(args.camera_length_mm, args.pixel_size_um, args.voltage_kv)
    else:
        raise RingidError(None, "give --camera-constant-a-px or both --camera-length-mm and --pixel-size-um")
    sim = simulate_pattern(
        d, inten, camera_constant_A_px=k, shape=tuple(args.shape), center_x_px=args.center_x_px,
        center_y_px=args.center_y_px, ellipticity=args.ellipticity, ellipse_angle_deg=args.ellipse_angle_deg,
        voltage_kv=args.voltage_kv, instrument_fwhm_per_nm=args.instrument_fwhm_per_nm,
        crystallite_size_nm=args.crystallite_size_nm, n_grains=args.n_grains, texture_strength=args.texture_strength,
        dose=args.dose, beam_stop=args.beam_stop, beam_stop_angle_deg=args.beam_stop_angle_deg,
        hot_pixel_fraction=args.hot_pixel_fraction, dead_pixel_fraction=args.dead_pixel_fraction, dtype=args.dtype,
        seed=args.seed)
    with atomic_path(args.output, suffix=".tif") as tmp:
        tifffile.imwrite(tmp, sim.image, photometric="minisblack")
    g = sim.geometry
    truth = {"image": args.output, "source": source, "camera_constant_A_px": g.camera_constant_A_px,
             "center_x_px": g.center_x_px, "center_y_px": g.center_y_px, "ellipticity": g.ellipticity,
             "ellipse_angle_deg": g.ellipse_angle_deg, "voltage_kv": g.voltage_kv,
             "ring_g_per_nm": sim.ring_g_per_nm, "ring_fwhm_per_nm": sim.ring_fwhm_per_nm, "settings": sim.settings,
             "note": "synthetic pattern made by ringid simulate (demo/test data)"}
    from pathlib import Path

    write_json(args.truth_json or Path(args.output).with_suffix(".json"), truth)
    return 0
