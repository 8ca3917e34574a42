"""Command line: ``recinet analyze | iv | serve | net | demo``.

Every command prints a one-line message on stderr and exits non-zero on bad
input; it never leaves a partial output file.
"""

from __future__ import annotations

import argparse
import sys

from .errors import RecinetError

__all__ = ["main", "build_parser"]


def _cmd_net(args) -> int:
    from .nets import classify_net, parse_substrate, point_group_name, reciprocal

    net = parse_substrate(args.substrate)
    rec = reciprocal(net)
    print(f"{net.label}: {classify_net(net)} ({point_group_name(net)})")
    print(f"  a = {net.a:.4f} Å, b = {net.b:.4f} Å, γ = {net.gamma_deg:.2f}°")
    print(f"  a* = {rec.a:.5f} Å⁻¹, b* = {rec.b:.5f} Å⁻¹, γ* = {rec.gamma_deg:.2f}° (no 2π)")
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
