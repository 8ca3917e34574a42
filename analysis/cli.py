"""Command line: ``recinet analyze | calibrate | iv | watch | serve | net``.

Every command prints a one-line message on stderr and exits with status 2 on
bad input; it checks its output folders before any work and never leaves a
partial output file.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING

from .errors import FitError, ImageError, ParameterError, RecinetError, SeriesError
from .files import write_text_atomic

if TYPE_CHECKING:
    from .optics import ScreenGeometry

__all__ = ["main", "build_parser", "add_iv_parser"]


def _version() -> str:
    """The installed package's version (its metadata), else the source tree's."""
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("recinet")
    except PackageNotFoundError:
        from . import __version__

        return __version__


def _check_output(path, option: str) -> Path:
    """The output file `path` of `option`, once its folder is known to exist and be writable."""
    import os

    p = Path(path)
    folder = p.resolve().parent
    if not folder.is_dir():
        raise ParameterError(f"{option}: the folder {folder} does not exist.")
    if not os.access(folder, os.W_OK | os.X_OK):
        raise ParameterError(f"{option}: the folder {folder} is not writable.")
    if p.is_dir():
        raise ParameterError(f"{option}: {p} is a folder; give a file name.")
    return p


def _cmd_net(args) -> int:
    from .nets import classify_net, parse_substrate, point_group_name, reciprocal

    net = parse_substrate(args.substrate)
    rec = reciprocal(net)
    print(f"{net.label}: {classify_net(net)} ({point_group_name(net)})")
    print(f"  a = {net.a:.4f} Å, b = {net.b:.4f} Å, γ = {net.gamma_deg:.2f}°")
    print(f"  a* = {rec.a:.5f} Å⁻¹, b* = {rec.b:.5f} Å⁻¹, γ* = {rec.gamma_deg:.2f}° (no 2π)")
    return 0


def _summary(d: dict) -> str:
    sub, ov = d["substrate"], d["overlayer"]
    sig = sub.get("sigma") or {}

    def pm(v, s):
        return f"{v:.4f}" + (f" ± {s:.4f}" if s else "")

    lines = [
        f"substrate: {sub['spec']} — {sub['net']} net, a = {pm(sub['a_angstrom'], sig.get('a_angstrom'))} Å, "
        f"b = {pm(sub['b_angstrom'], sig.get('b_angstrom'))} Å, γ = {sub['gamma_deg']:.2f}° "
        f"({sub['lattice_source']}; reading confidence {sub['confidence']:.0%})",
        f"  reciprocal: a* = {sub['a_star_invA']:.5f} Å⁻¹, b* = {sub['b_star_invA']:.5f} Å⁻¹, "
        f"γ* = {sub['gamma_star_deg']:.2f}° (no 2π)",
        f"  centre (x, y) = ({d['center_px'][0]:.2f}, {d['center_px'][1]:.2f}) px",
        f"overlayer: {ov['kind']}; Wood notation: {ov['wood'] or 'none exists'}; matrix {ov['matrix_text']}",
    ]
    if ov["wood_note"]:
        lines.append(f"  {ov['wood_note']}")
    if ov["kind"] != "none":
        lines.append(f"  domains: {ov['n_domains']} of {ov['symmetry_domains']} by symmetry "
                     f"({', '.join(ov['domain_operations'])}); coverage {ov['coverage']:.4g} ML for one "
                     f"adsorbate per cell; overlayer net {ov['net']['type']} a = {ov['net']['a_angstrom']:.3f} Å, "
                     f"b = {ov['net']['b_angstrom']:.3f} Å, γ = {ov['net']['gamma_deg']:.2f}°")
    for twin in ov.get("same_beams_as") or []:
        lines.append(f"  same beams as {twin['name']} in {twin['n_domains']} domain(s): only the spot intensities "
                     f"(domain populations, I(V)) tell the two apart")
    n = len(d["spots"])
    n_int = sum(s["kind"] == "integer" for s in d["spots"])
    lines.append(f"spots: {n} ({n_int} integer order, {ov['explained']} fractional explained, "
                 f"{ov['unexplained_count']} unexplained, {ov['absent']} predicted but absent)")
    if len(d["candidates"]) > 1:
        lines.append("other candidates: " + "; ".join(
            f"{c['wood'] or c['matrix_text']} ×{c['n_domains']} (score {c['score']:.1f})" for c in d["candidates"][1:4]))
    lines += [f"warning: {w}" for w in d.get("warnings", [])]
    return "\n".join(lines)


def _cmd_analyze(args) -> int:
    from .calibration import Calibration
    from .io import load_image
    from .pipeline import analyze_image
    from .serialize import result_to_dict

    if (args.reference is None) != (args.reference_energy is None):
        raise ParameterError("--reference and --reference-energy go together.")
    if args.json:
        _check_output(args.json, "--json")
    image = load_image(args.image)
    ref = load_image(args.reference) if args.reference else None
    cal = Calibration.load_json(args.calibration) if args.calibration else None
    try:
        result = analyze_image(image, energy_eV=args.energy, substrate=args.substrate, reference=ref,
                               reference_energy_eV=args.reference_energy, calibration=cal,
                               sigma_px=args.spot_sigma, min_snr=args.min_snr, tol_px=args.tolerance)
    except FitError as err:
        if cal is None or cal.distortion_measured:
            raise
        raise FitError(f"{err} The calibration {Path(args.calibration).name} did not measure the distortion "
                       f"(its reference showed one ring of beams), which may be why.") from None
    d = result_to_dict(result)
    if cal is not None and not cal.distortion_measured:
        d["warnings"].append(_UNMEASURED_DISTORTION.format(name=Path(args.calibration).name,
                                                           d=cal.geometry.distortion))
    if args.json:
        write_text_atomic(args.json, json.dumps(d, indent=1, ensure_ascii=False, allow_nan=False))
    if not args.quiet:
        print(_summary(d))
    return 0


_UNMEASURED_DISTORTION = (
    "The calibration {name} did not measure the distortion (its reference showed one ring of beams; R/L held "
    "at {d:.3f}): its scale holds at that ring's exit angle only, so lattice constants measured from spots at "
    "other angles carry a systematic error. Calibrate on a reference showing two or more rings.")


def _cmd_calibrate(args) -> int:
    import numpy as np

    from .calibration import Calibration, calibrate_from_reference
    from .io import load_image
    from .nets import parse_substrate, reciprocal
    from .pipeline import check_energy
    from .spots import measure_image

    out = _check_output(args.out, "--out")
    energy = check_energy(args.energy)
    net = parse_substrate(args.substrate)
    image = load_image(args.reference)
    meas = measure_image(image, sigma_px=args.spot_sigma, min_snr=args.min_snr)
    fit, hk = calibrate_from_reference(meas.spots.xy, net, energy)
    used = hk[np.isfinite(hk[:, 0])]
    g = np.linalg.norm(used @ reciprocal(net).vectors, axis=1)
    rings = int(np.unique(np.round(g / g.min(), 4)).size)
    cal = Calibration.from_fit(fit, image_shape=tuple(int(v) for v in image.shape), n_rings=rings,
                               substrate=net.label or args.substrate,
                               note=f"recinet calibrate {Path(args.reference).name} at {energy:g} eV")
    cal.save_json(out)
    geo, unc = cal.geometry, cal.uncertainty
    if cal.distortion_measured:
        dist = f"distortion {geo.distortion:.4f} ± {unc.get('distortion', float('nan')):.4f}"
    else:
        dist = f"distortion {geo.distortion:.4f} not measured (one ring of beams: held fixed)"
    print(f"calibration: centre ({geo.center_x_px:.2f}, {geo.center_y_px:.2f}) ± "
          f"({unc.get('center_x_px', float('nan')):.2f}, {unc.get('center_y_px', float('nan')):.2f}) px, "
          f"scale {geo.scale_px:.2f} ± {unc.get('scale_px', float('nan')):.2f} px, {dist}, "
          f"rms {cal.rms_px:.3f} px, {cal.n_spots} beams in {rings} ring{'s' * (rings != 1)} "
          f"({cal.substrate} at {energy:g} eV) -> {out}")
    return 0


def _check_port(host: str, port: int) -> None:
    """Refuse a port the web server could not listen on (the same address family and socket options)."""
    import errno
    import os
    import socket

    if os.environ.get("WERKZEUG_RUN_MAIN") == "true":  # the reloader's child inherits the bound socket
        return
    if not 0 <= port <= 65535:
        raise ParameterError(f"--port must be 0 to 65535, got {port}.")
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    try:
        addr = socket.getaddrinfo(host, port, family, socket.SOCK_STREAM, socket.IPPROTO_TCP)[0][4]
    except (socket.gaierror, UnicodeError) as exc:
        raise ParameterError(f"--host {host!r} is not an address of this machine ({exc}).") from None
    with socket.socket(family, socket.SOCK_STREAM) as s:
        s.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            s.bind(addr)
        except OSError as exc:
            if exc.errno == errno.EADDRINUSE:
                raise ParameterError(f"Port {port} on {host} is already in use; stop the program using it or "
                                     f"choose another with --port.") from None
            raise ParameterError(f"Cannot listen on {host}:{port} ({exc.strerror or exc}).") from None


def _cmd_serve(args) -> int:
    _check_port(args.host, args.port)  # before the web layer prints that it is serving
    from webapp.app import run  # the web layer is imported only here

    run(host=args.host, port=args.port, debug=args.debug)
    return 0


def _progress_bar(stream) -> Callable[[int, int | None, float], None]:
    t0 = time.perf_counter()

    def show(i: int, n: int | None, e: float) -> None:
        width = 30
        if n:
            done = int(width * i / n)
            bar = "#" * done + "." * (width - done)
            text = f"\r[{bar}] {i}/{n} frames  {e:7.1f} eV  {time.perf_counter() - t0:5.1f} s"
        else:
            text = f"\r{i} frames  {e:7.1f} eV  {time.perf_counter() - t0:5.1f} s"
        stream.write(text)
        stream.flush()

    return show


def _read_geometry(path) -> ScreenGeometry:
    from .optics import ScreenGeometry

    p = Path(path)
    try:
        d = json.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SeriesError(f"Geometry file {p.name} not found ({p}).") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise SeriesError(f"Geometry file {p.name} is not readable JSON ({type(exc).__name__}).") from None
    if isinstance(d, dict) and isinstance(d.get("geometry"), dict):
        d = d["geometry"]
    if not isinstance(d, dict):
        raise SeriesError(f"Geometry file {p.name} must hold a JSON object of screen-geometry fields.")
    try:
        return ScreenGeometry.from_dict(d)
    except (TypeError, ValueError) as exc:
        raise SeriesError(f"Geometry file {p.name}: {exc}") from None


def add_iv_parser(subparsers) -> argparse.ArgumentParser:
    """Add the ``iv`` command to an argparse sub-parser collection; returns its parser.

    Parameters
    ----------
    subparsers : argparse._SubParsersAction
        What ``ArgumentParser.add_subparsers`` returned.

    Returns
    -------
    argparse.ArgumentParser
        The ``iv`` parser.
    """
    from .series.energies import DEFAULT_NAME_PATTERN

    p = subparsers.add_parser(
        "iv", help="I(V) curves from an energy series (multi-page TIFF, folder or zip)",
        description="Track every beam through an energy series and write its I(V) curve.",
        formatter_class=argparse.ArgumentDefaultsHelpFormatter)
    p.add_argument("series", help="multi-page TIFF, folder of images, or zip of images")
    p.add_argument("--substrate", required=True, help="substrate, e.g. 'Cu(100)' or 'hexagonal:2.775'")
    p.add_argument("--energies", help="CSV or JSON file with the energy of every frame "
                                      "(columns energy_eV or energy; optional frame, current)")
    p.add_argument("--start-eV", type=float, dest="start_eV", help="energy of the first frame (with --step-eV)")
    p.add_argument("--step-eV", type=float, dest="step_eV", help="energy step between frames")
    p.add_argument("--name-pattern", default=DEFAULT_NAME_PATTERN,
                   help="regular expression reading the energy from each file name (first group)")
    p.add_argument("--csv", required=True, help="output CSV: energy_eV, then one column per beam")
    p.add_argument("--json", help="output JSON with curves, flags, calibration and equivalent groups")
    p.add_argument("--geometry", help="JSON screen geometry (a saved calibration); default: index frames")
    p.add_argument("--index-frame", type=int, dest="index_frame", metavar="N",
                   help="index only this frame (0-based) when no --geometry is given; default: up to seven frames "
                        "spread over the range (up to 300 eV) are indexed together, with one camera")
    p.add_argument("--overlayer", action="append", default=[], metavar="MATRIX",
                   help="superstructure matrix, e.g. '2 0 / 0 2' (repeat for several)")
    p.add_argument("--all-domains", action="store_true", help="add the symmetry-equivalent domains")
    p.add_argument("--azimuth-deg", type=float, default=0.0, dest="azimuth_deg",
                   help="sample azimuth when --geometry is given")
    p.add_argument("--symmetry", default="auto", help="equivalence group: auto, full, p3m1, p31m, p1…p6")
    p.add_argument("--average", action="store_true", help="one CSV column per group of equivalent beams")
    p.add_argument("--smooth-eV", type=float, default=0.0, dest="smooth_eV", help="Gaussian smoothing FWHM")
    p.add_argument("--v0i-eV", type=float, default=4.0, dest="v0i_eV", help="V0i for the Pendry R-factor")
    p.add_argument("--radius-px", type=float, dest="radius_px", help="aperture radius (default from spot size)")
    p.add_argument("--background", choices=("annulus", "plane"), default="annulus")
    p.add_argument("--method", choices=("aperture", "profile"), default="aperture")
    p.add_argument("--gain", type=float, default=1.0, help="frame units per detected count (uncertainties)")
    p.add_argument("--mask", help="image file: non-zero pixels may be used (default: screen minus gun shadow "
                                  "found in frame 0)")
    p.add_argument("--save-calibration", dest="save_calibration",
                   help="write the fitted screen geometry as a calibration file (the JSON `recinet calibrate` writes)")
    p.add_argument("--no-current", action="store_true", help="do not divide by the beam current")
    p.set_defaults(func=_cmd_iv)
    return p


def _series_calibration_file(series_cal, energies_eV, frame_shape, substrate, source: str):
    """The screen geometry fitted over a series as a :class:`~analysis.calibration.Calibration` (one file format
    for every calibration: `recinet analyze --calibration` and `recinet iv --geometry` read it)."""
    import datetime as dt

    import numpy as np

    from .calibration import Calibration

    return Calibration(geometry=series_cal.geometry, uncertainty=dict(series_cal.uncertainty),
                       energies_eV=tuple(float(v) for v in np.unique(np.asarray(energies_eV, float))),
                       n_spots=int(series_cal.n_points), rms_px=float(series_cal.rms_px),
                       image_shape=tuple(int(v) for v in frame_shape), substrate=substrate.label or "",
                       note=f"recinet iv {source}: beams of {series_cal.n_frames} frames",
                       created=dt.datetime.now(dt.timezone.utc).replace(microsecond=0).isoformat(),
                       distortion_measured="distortion" in series_cal.uncertainty)


def _cmd_iv(args) -> int:
    import numpy as np

    from .nets import parse_substrate
    from .series import csv_text, result_to_dict
    from .series.energies import _StartStep, read_energy_file
    from .series.export import _atomic_write
    from .series.pipeline import run_iv

    substrate = parse_substrate(args.substrate)
    if args.energies and args.start_eV is not None:
        raise SeriesError("Give either --energies or --start-eV/--step-eV, not both.")
    if (args.start_eV is None) != (args.step_eV is None):
        raise SeriesError("--start-eV and --step-eV go together.")
    if args.index_frame is not None and args.geometry:
        raise SeriesError("Give either --geometry or --index-frame, not both.")
    if args.index_frame is not None and args.index_frame < 0:
        raise SeriesError(f"--index-frame must be 0 or more, got {args.index_frame}.")
    energies = None
    if args.energies:
        energies = read_energy_file(args.energies)
    elif args.start_eV is not None:
        energies = _StartStep(args.start_eV, args.step_eV)
    overlayer = None
    if args.overlayer:
        from .superstructure import parse_matrix

        overlayer = [parse_matrix(t) for t in args.overlayer]
    for out, option in ((args.csv, "--csv"), (args.json, "--json"), (args.save_calibration, "--save-calibration")):
        if out:
            try:
                _check_output(out, option)
            except ParameterError as err:
                raise SeriesError(str(err)) from None
    saturation = None
    if not Path(args.series).is_dir():
        from .io import load_image
        from .series.track import _STACK_MAX_BYTES

        try:
            saturation = load_image(args.series, max_bytes=_STACK_MAX_BYTES).saturation_level
        except ImageError:
            saturation = None  # a zip, or unreadable: the run names the problem
    mask = None
    if args.mask:
        from .io import load_image

        mask = load_image(args.mask, _allow_constant=True).data > 0
    geom = _read_geometry(args.geometry) if args.geometry else None
    bar = _progress_bar(sys.stderr) if sys.stderr.isatty() else None
    try:
        run = run_iv(args.series, substrate=substrate, energies=energies, overlayer=overlayer, geometry=geom,
                     azimuth_deg=args.azimuth_deg, index_frame=args.index_frame, name_pattern=args.name_pattern,
                     mask=mask, all_domains=args.all_domains, symmetry=args.symmetry, radius_px=args.radius_px,
                     background=args.background, method=args.method, gain=args.gain, saturation_level=saturation,
                     normalise_current=not args.no_current, progress=bar)
    except SeriesError as err:
        if geom is None and ("indexed" in str(err) or "Could not index" in str(err)):
            raise SeriesError(f"{err} Give --geometry with a saved calibration, or another frame with "
                              "--index-frame.") from None
        raise
    finally:
        if bar is not None:
            sys.stderr.write("\n")
    res, found = run.result, run.indexing
    if found is not None:
        for w in found.warnings:
            print(f"note: {w}", file=sys.stderr)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        texts = [(args.csv, csv_text(res, averaged=args.average, smooth_eV=args.smooth_eV, v0i_eV=args.v0i_eV))]
        if args.json:
            texts.append((args.json, json.dumps(result_to_dict(res, v0i_eV=args.v0i_eV, smooth_eV=args.smooth_eV),
                                                indent=1, allow_nan=False)))
    if args.save_calibration:
        if res.calibration is None:
            raise SeriesError("No calibration could be fitted from the series (too few refined beams).")
        cal_file = _series_calibration_file(res.calibration, res.energy_eV, run.frame_shape, substrate,
                                            Path(args.series).name)
        texts.append((args.save_calibration, json.dumps(cal_file.to_dict(), indent=2, allow_nan=False,
                                                        ensure_ascii=False)))
    for path, text in texts:
        _atomic_write(path, text)
    n_beams = int(np.sum(res.valid.any(axis=0)))
    cal = res.calibration
    msg = f"{res.energy_eV.size} frames, {n_beams} beams -> {args.csv}"
    if found is not None and found.joint is not None:
        j = found.joint
        msg += (f"; {len(j['frames'])} frames indexed together: {found.label} ({j['frames_agreeing']} of "
                f"{j['frames_total']} frames put the substrate beams there alone; the model explains "
                f"{100 * j['explained_median']:.0f} % of a frame's spots, {100 * j['explained_min']:.0f} % at "
                f"least; rms {j['rms_px']:.2f} px)")
    elif found is not None:
        msg += f"; indexed frame {found.frame} ({found.energy_eV:g} eV): {found.label}"
    if cal is not None:
        g = cal.geometry
        msg += (f"; centre ({g.center_x_px:.2f}, {g.center_y_px:.2f}) px, scale {cal.scale_px_sqrt_eV_A:.1f} "
                f"px·√eV·Å, distortion {g.distortion:.3f}, rms {cal.rms_px:.2f} px")
    print(msg)
    return 0


def build_parser() -> argparse.ArgumentParser:
    """The ``recinet`` parser with every command.

    Returns
    -------
    argparse.ArgumentParser
        Each command's parser sets ``func``, the function that runs it.
    """
    p = argparse.ArgumentParser(prog="recinet", description="Analyse LEED patterns: spots, nets, superstructures, I(V).")
    p.add_argument("--version", action="version", version=f"recinet {_version()}")
    sub = p.add_subparsers(dest="command", required=True)

    n = sub.add_parser("net", help="describe a substrate net (e.g. 'Pt(111)', 'square:2.55')")
    n.add_argument("substrate")
    n.set_defaults(func=_cmd_net)

    a = sub.add_parser("analyze", help="index one LEED image: substrate net, overlayer, domains, Wood notation")
    a.add_argument("image", help="camera image (PNG, TIFF, JPEG, BMP)")
    a.add_argument("--energy", type=float, required=True, help="beam energy, eV")
    a.add_argument("--substrate", required=True, help="e.g. 'Pt(111)', 'hexagonal:2.775', 'rectangular:2.556,3.615'")
    a.add_argument("--reference", help="image of the clean substrate from the same optics")
    a.add_argument("--reference-energy", type=float, help="energy of the reference image, eV")
    a.add_argument("--calibration", help="saved camera calibration (JSON)")
    a.add_argument("--json", help="write the analysis here (JSON)")
    a.add_argument("--spot-sigma", type=float, default=None, help="spot σ in px (default: measured)")
    a.add_argument("--min-snr", type=float, default=5.0, help="detection threshold in units of local noise")
    a.add_argument("--tolerance", type=float, default=2.5, help="spot matching tolerance, px")
    a.add_argument("--quiet", action="store_true", help="no summary on stdout")
    a.set_defaults(func=_cmd_analyze)

    c = sub.add_parser("calibrate", help="camera calibration from an image of a clean, known substrate",
                       description="Fit the camera model (centre, scale, distortion, rotation, ellipticity) to the "
                                   "beams of a clean substrate and write it for `recinet analyze --calibration`.")
    c.add_argument("reference", help="camera image of the clean substrate (PNG, TIFF, JPEG, BMP)")
    c.add_argument("--energy", type=float, required=True, help="beam energy of the reference image, eV")
    c.add_argument("--substrate", required=True, help="the clean substrate, e.g. 'Cu(100)' or 'square:2.556'")
    c.add_argument("--out", required=True, help="write the calibration here (JSON)")
    c.add_argument("--spot-sigma", type=float, default=None, help="spot σ in px (default: measured)")
    c.add_argument("--min-snr", type=float, default=5.0, help="detection threshold in units of local noise")
    c.set_defaults(func=_cmd_calibrate)

    s = sub.add_parser("serve", help="start the web app (http://127.0.0.1:8050)")
    s.add_argument("--host", default="127.0.0.1")
    s.add_argument("--port", type=int, default=8050)
    s.add_argument("--debug", action="store_true")
    s.set_defaults(func=_cmd_serve)

    add_iv_parser(sub)
    from .follow.watch import add_watch_parser  # recinet watch: a parameter series as the files arrive

    add_watch_parser(sub)
    return p


def main(argv: list[str] | None = None) -> int:
    """Run one ``recinet`` command; errors are one line on stderr.

    Parameters
    ----------
    argv : list of str, optional
        The arguments after the program name; default ``sys.argv[1:]``.

    Returns
    -------
    int
        The exit status: the command's own (0 on success), 2 after an error.
    """
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except RecinetError as err:
        print(f"recinet: error: {err}", file=sys.stderr)
        return 2
    except (OSError, MemoryError) as err:
        print(f"recinet: error: {err}", file=sys.stderr)
        return 2


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
