"""Command line: ``recinet analyze | iv | serve | net | demo``.

Every command prints a one-line message on stderr and exits non-zero on bad
input; it never leaves a partial output file.
"""

from __future__ import annotations

import argparse
import sys

from .errors import ParameterError, RecinetError

__all__ = ["main", "build_parser"]


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
    n = len(d["spots"])
    n_int = sum(s["kind"] == "integer" for s in d["spots"])
    lines.append(f"spots: {n} ({n_int} integer order, {ov['explained']} fractional explained, "
                 f"{ov['unexplained_count']} unexplained, {ov['absent']} predicted but absent)")
    if len(d["candidates"]) > 1:
        lines.append("other candidates: " + "; ".join(
            f"{c['wood'] or c['matrix_text']} ×{c['n_domains']} (score {c['score']:.1f})" for c in d["candidates"][1:4]))
    lines += [f"warning: {w}" for w in d.get("warnings", [])]
    return "\n".join(lines)


def _write_json_atomic(path: str, data: dict) -> None:
    import json
    import os

    tmp = f"{path}.tmp-{os.getpid()}"
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(data, fh, indent=1, ensure_ascii=False, allow_nan=False)
    os.replace(tmp, path)


def _cmd_analyze(args) -> int:
    from .calibration import Calibration
    from .io import load_image
    from .pipeline import analyze_image
    from .serialize import result_to_dict

    if (args.reference is None) != (args.reference_energy is None):
        raise ParameterError("--reference and --reference-energy go together.")
    image = load_image(args.image)
    ref = load_image(args.reference) if args.reference else None
    cal = Calibration.load_json(args.calibration) if args.calibration else None
    result = analyze_image(image, energy_eV=args.energy, substrate=args.substrate, reference=ref,
                           reference_energy_eV=args.reference_energy, calibration=cal,
                           sigma_px=args.spot_sigma, min_snr=args.min_snr, tol_px=args.tolerance)
    d = result_to_dict(result)
    if args.json:
        _write_json_atomic(args.json, d)
    if not args.quiet:
        print(_summary(d))
    return 0


def _cmd_serve(args) -> int:
    from webapp.app import run  # the web layer is imported only here

    run(host=args.host, port=args.port, debug=args.debug)
    return 0


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="recinet", description="Analyse LEED patterns: spots, nets, superstructures, I(V).")
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

    s = sub.add_parser("serve", help="start the web app (http://127.0.0.1:8050)")
    s.add_argument("--host", default="127.0.0.1")
    s.add_argument("--port", type=int, default=8050)
    s.add_argument("--debug", action="store_true")
    s.set_defaults(func=_cmd_serve)

    from .series import add_iv_parser
    add_iv_parser(sub)
    return p


def main(argv: list[str] | None = None) -> int:
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
