"""``ringid calibrate``: camera constant, centre and ellipse from a pattern of a standard film.

    ringid calibrate IMAGE --standard Au --library LIB --voltage-kv 200 -o CAL.json
    ringid calibrate IMAGE --pyfai-calibrant Au --voltage-kv 200 --camera-length-mm 400 --pixel-size-um 30 -o CAL.json

With a nominal camera length and pixel size the ring assignment trusts the nominal
constant to ±15 %; without them it searches. Fewer than three assigned rings is
an error (exit 1).
"""

from __future__ import annotations


def add_parser(subparsers, name: str, help_text: str) -> None:
    p = subparsers.add_parser(name, help=help_text, description=help_text)
    p.add_argument("image", metavar="IMAGE", help="pattern of the standard (TIFF or .npy)")
    src = p.add_mutually_exclusive_group(required=True)
    src.add_argument("--standard", metavar="PHASE", help="the standard's phase id in the library (needs --library)")
    src.add_argument("--pyfai-calibrant", metavar="NAME",
                     help="use pyFAI's calibrant d-spacing table NAME (e.g. Au, Si) instead of the library")
    p.add_argument("--library", metavar="LIB", help="phase library folder")
    p.add_argument("--voltage-kv", type=float, required=True, metavar="V", help="accelerating voltage in kV")
    p.add_argument("--camera-length-mm", type=float, metavar="L", help="nominal camera length in mm")
    p.add_argument("--pixel-size-um", type=float, metavar="P", help="detector pixel size in µm")
    p.add_argument("--camera-constant-a-px", "--camera-constant-A-px", dest="camera_constant_A_px", type=float,
                   metavar="K", help="nominal camera constant in Å·px")
    p.add_argument("--mask", metavar="MASK", help="extra mask image (non-zero = excluded)")
    p.add_argument("--frame", type=int, metavar="N", help="use this frame of a multi-frame file (default: sum)")
    p.add_argument("-o", "--output", required=True, metavar="CAL.json", help="calibration file to write")
    p.set_defaults(func=run)


def run(args) -> int:
    import sys

    from ringid.calibration.calibrate import calibrate_image, pyfai_calibrant_rings, write_calibration
    from ringid.core.errors import RingidError
    from ringid.core.units import nominal_camera_constant_a_px

    if args.standard:
        if not args.library:
            raise RingidError(None, "--standard needs --library (or use --pyfai-calibrant)")
        from ringid.library.store import read_phase_rings

        rings = read_phase_rings(args.library, args.standard)
        d, inten, hkl = rings.d_angstrom, rings.intensity, rings.hkl
        name, source = args.standard, f"phase library {args.library}"
    else:
        d, inten, hkl = pyfai_calibrant_rings(args.pyfai_calibrant)
        name, source = args.pyfai_calibrant, "pyFAI calibrant table"
    nominal = args.camera_constant_A_px
    if nominal is None and args.camera_length_mm and args.pixel_size_um:
        nominal = nominal_camera_constant_a_px(args.camera_length_mm, args.pixel_size_um, args.voltage_kv)
    cal = calibrate_image(args.image, d, voltage_kv=args.voltage_kv, standard_intensity=inten, standard_hkl=hkl,
                          nominal_camera_constant_A_px=nominal, standard=name, standard_source=source,
                          user_mask_path=args.mask, frame=args.frame)
    write_calibration(args.output, cal, pixel_size_um=args.pixel_size_um, nominal_camera_constant_A_px=nominal)
    g = cal.geometry
    radial = ""
    if g.radial_distortion_k3_per_px2:
        r_out = g.camera_constant_A_px * float(cal.ring_g_obs_per_nm.max()) / 10.0
        radial = f", radial distortion {100 * g.radial_distortion_k3_per_px2 * r_out**2:+.3f} % at {r_out:.0f} px"
    print(f"{args.image}: K = {g.camera_constant_A_px:.3f} ± {cal.camera_constant_sigma_A_px:.3f} Å·px, "
          f"centre ({g.center_x_px:.2f}, {g.center_y_px:.2f}) px, ellipticity {g.ellipticity:.5f} at "
          f"{g.ellipse_angle_deg:.1f}°{radial}, {cal.ring_d_calc_angstrom.size} rings", file=sys.stderr)
    return 0
